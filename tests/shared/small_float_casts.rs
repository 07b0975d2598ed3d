//! One check run twice, natively (`crosscheck.rs`) and in wasm (`wasm_boundary.rs`), since the
//! four-lane kernels differ per target (SSE2 and wasm `simd128`).
//!
//! Source: ml_dtypes 0.5.4's float4_e2m1fn, float6_e2m3fn, float6_e3m2fn, float8_e4m3fn and
//! float8_e5m2 casts (OCP OFP8 and MX v1.0 element types), stored in `fixtures/manifest.json`
//! by `fixtures/make_fixtures.py`: every representable value, every exact tie between
//! neighbours, values just past the ties, random values, subnormal underflow and −0 agree
//! exactly, both in the scalar reference `MiniFloat::round` and in the kernel every analysis
//! runs (a grid with scale 1). Past the maximum ml_dtypes gives NaN (E4M3) or ∞ (E5M2) where
//! we saturate to ±max, the specifications' saturating mode.

use bitloupe::formats::minifloat::{E2M1, E2M3, E3M2, E4M3, E5M2};
use bitloupe::formats::{Format, Grid};
use bitloupe::grid::GroupParams;
use bitloupe::ScaleDType;

/// Panics at the first value where either rounding differs from ml_dtypes.
pub fn check_small_float_casts(manifest: &str) {
    let m: serde_json::Value = serde_json::from_str(manifest).unwrap();
    for f in [E2M1, E2M3, E3M2, E4M3, E5M2] {
        let case = &m["formats"]["casts"][f.name];
        assert_eq!(case["max"].as_f64().unwrap() as f32, f.max, "{} maximum", f.name);
        let inputs: Vec<f32> = case["input"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap() as f32).collect();
        let format: Format = f.name.to_lowercase().parse().unwrap();
        let mut kernel = vec![f32::NAN; inputs.len()];
        Grid::Scaled { format, scale_dtype: ScaleDType::F32 }.quantize_into(GroupParams { scale: 1.0, zero: 0.0 }, &inputs, &mut kernel);
        for ((x, want), from_kernel) in inputs.iter().zip(case["expected"].as_array().unwrap()).zip(kernel) {
            let want = want.as_f64().map_or(f.max.copysign(*x), |w| w as f32);
            assert_eq!(f.round(*x).to_bits(), want.to_bits(), "{} of {x:e}: {} vs {want}", f.name, f.round(*x));
            assert_eq!(from_kernel.to_bits(), want.to_bits(), "{} kernel of {x:e}: {from_kernel} vs {want}", f.name);
        }
    }
}
