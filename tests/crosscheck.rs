//! Cross-checks of the core against outside references. Each check names its source.
//!
//! Fixtures in `fixtures/` were written by the real numpy 2.3.5, safetensors 0.7.0 and
//! ml_dtypes 0.5.4 packages (`fixtures/make_fixtures.py`, versions pinned in
//! `fixtures/requirements.txt`); `fixtures/manifest.json` holds the values numpy computed.

use bitloupe::demo::Rng;
use bitloupe::tensor::{self, ReadOptions};
use bitloupe::{analyze, DType, Granularity, Recipe, ScaleDType, Tensor};
use half::{bf16, f16};
use ndarray::Array2;
use serde_json::Value;
use std::path::PathBuf;

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../fixtures").join(name)
}

fn manifest() -> Value {
    serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap()
}

fn floats(v: &Value) -> Vec<f32> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap() as f32).collect()
}

fn open(name: &str, tensor: &str, opts: ReadOptions) -> Tensor {
    let file = std::fs::File::open(fixture(name)).unwrap();
    let listing = tensor::list(&file, opts).unwrap();
    let entry = listing.choose((!tensor.is_empty()).then_some(tensor)).unwrap();
    tensor::read(&file, entry).unwrap()
}

/// Source: numpy's own `np.save` / `np.lib.format.write_array` and `safetensors.serialize_file`
/// output, with the values numpy converted to float32.
#[test]
fn every_fixture_file_reads_as_numpy_wrote_it() {
    let m = manifest();
    let cases = m["files"].as_array().unwrap();
    assert!(cases.len() >= 20);
    for case in cases {
        let file = case["file"].as_str().unwrap();
        let name = case["tensor"].as_str().unwrap();
        let opts = ReadOptions { raw16_as_bf16: case.get("raw16_as_bf16").is_some() };
        let t = open(file, name, opts);
        let shape: Vec<usize> = case["shape"].as_array().unwrap().iter().map(|d| d.as_u64().unwrap() as usize).collect();
        let view: Vec<usize> = case["view"].as_array().unwrap().iter().map(|d| d.as_u64().unwrap() as usize).collect();
        assert_eq!(t.shape, shape, "{file} {name}");
        assert_eq!(vec![t.rows(), t.cols()], view, "{file} {name}: 2-D view");
        let got: Vec<f32> = t.values.iter().copied().collect();
        assert_eq!(got, floats(&case["values"]), "{file} {name}: values");
    }
}

/// Source: numpy refuses to give object and structured arrays a single number type; we refuse
/// them with a message instead of misreading their bytes.
#[test]
fn object_and_structured_arrays_are_refused_clearly() {
    for name in ["npy_object.npy", "npy_structured.npy"] {
        let file = std::fs::File::open(fixture(name)).unwrap();
        let err = tensor::list(&file, ReadOptions::default()).unwrap_err();
        assert!(matches!(err, bitloupe::Error::UnsupportedDtype { .. }), "{name}: {err}");
    }
    let file = std::fs::File::open(fixture("npy_bf16_raw.npy")).unwrap();
    let err = tensor::list(&file, ReadOptions::default()).unwrap_err();
    assert!(err.to_string().contains("bf16"), "{err}");
}

/// Source: the safetensors listing lists every tensor with its dtype, shape and byte size from
/// the header alone; the byte sizes follow from the shape and the dtype's width.
#[test]
fn safetensors_listing_matches_the_header_written_by_safetensors() {
    let file = std::fs::File::open(fixture("multi.safetensors")).unwrap();
    let listing = tensor::list(&file, ReadOptions::default()).unwrap();
    let names: Vec<&str> = listing.entries.iter().map(|e| e.name.as_str()).collect();
    assert_eq!(
        names,
        [
            "block.0.attn.k.weight",
            "block.0.attn.q.weight",
            "block.0.mlp.up.weight",
            "block.2.bytes",
            "block.2.codes",
            "block.2.conv",
            "block.2.short",
            "block.10.norm.scale"
        ]
    );
    let k = listing.choose(Some("block.0.attn.k.weight")).unwrap();
    assert_eq!((k.dtype_label.as_str(), k.shape.as_slice(), k.bytes), ("BF16", &[4usize, 6][..], 48));
}

/// Source: numpy's float16 cast (IEEE 754 binary16, round to nearest even) and ml_dtypes'
/// bfloat16 cast, on the probe values of the fixtures script, with the foundation issue's rule:
/// a scale that rounds to 0 becomes the type's smallest positive normal, one that overflows is
/// refused.
#[test]
fn scale_rounding_matches_numpy_float16_and_ml_dtypes_bfloat16() {
    let m = manifest();
    let table = &m["scale_rounding"];
    let inputs = table["input_bits"].as_array().unwrap();
    for (i, bits) in inputs.iter().enumerate() {
        let x = f32::from_bits(bits.as_u64().unwrap() as u32);
        for (dtype, key, widen) in [
            (ScaleDType::F16, "f16_bits", (|b| f16::from_bits(b).to_f32()) as fn(u16) -> f32),
            (ScaleDType::BF16, "bf16_bits", |b| bf16::from_bits(b).to_f32()),
        ] {
            let reference = widen(table[key][i].as_u64().unwrap() as u16);
            let expected = if reference.is_infinite() {
                None
            } else if reference == 0.0 {
                Some(dtype.smallest_normal())
            } else {
                Some(reference)
            };
            assert_eq!(dtype.round(x), expected, "{x:e} as {}", dtype.name());
        }
    }
}

/// Source: the published bfloat16 definition — the top 16 bits of an IEEE 754 binary32, rounded
/// to nearest even — written out directly (for finite, non-NaN inputs).
#[test]
fn bf16_rounding_is_the_top_half_of_binary32_rounded_to_even() {
    let mut rng = Rng::new(3);
    for _ in 0..100_000 {
        let bits = rng.next_u64() as u32 & 0x7F7F_FFFF; // positive, finite, below the top binade
        let x = f32::from_bits(bits);
        let lsb = (bits >> 16) & 1;
        let top = (bits + 0x7FFF + lsb) >> 16;
        let expected = match f32::from_bits(top << 16) {
            e if e.is_infinite() => None,
            e if e == 0.0 && x != 0.0 => Some(ScaleDType::BF16.smallest_normal()),
            e => Some(e),
        };
        assert_eq!(ScaleDType::BF16.round(x), expected, "{x:e}");
    }
}

fn recipe_of(case: &Value) -> Recipe {
    Recipe {
        bits: case["bits"].as_u64().unwrap() as u8,
        granularity: case["group"].as_str().unwrap().parse::<Granularity>().unwrap(),
        symmetric: case["symmetric"].as_bool().unwrap(),
        scale_dtype: case["scale_dtype"].as_str().unwrap().parse::<ScaleDType>().unwrap(),
        ..Recipe::default()
    }
}

fn close(got: f64, want: f64, rel: f64) -> bool {
    (got - want).abs() <= rel * want.abs().max(1e-300)
}

/// Source: a plain numpy implementation of the foundation issue's equations in the fixtures
/// script (float32, `np.rint` rounds half to even, division by the scale), group by group.
/// Dequantized values must agree element by element; statistics (numpy in float64) to 1e-6,
/// the rounding bound of the core's f32 block sums.
#[test]
fn quantization_matches_the_numpy_reference_element_by_element() {
    let m = manifest();
    for case in m["quantization"].as_array().unwrap() {
        let recipe = recipe_of(case);
        let t = open(case["input"].as_str().unwrap(), "", ReadOptions::default());
        let expected = open(case["expected"].as_str().unwrap(), "", ReadOptions::default());
        let a = analyze(&t, &recipe).unwrap();
        let label = recipe.label();
        let mismatches = a.dequantized(&t).unwrap().iter().zip(expected.values.iter()).filter(|(g, w)| g != w).count();
        assert_eq!(mismatches, 0, "{label}: {mismatches} elements differ from numpy");
        assert!(close(a.totals.mse, case["mse"].as_f64().unwrap(), 1e-6), "{label} mse");
        assert!(close(a.totals.rel_fro_err, case["rel_fro_err"].as_f64().unwrap(), 1e-6), "{label} rel");
        assert!(close(f64::from(a.totals.max_abs_err), case["max_abs_err"].as_f64().unwrap(), 1e-6), "{label} max");
        match case["sqnr_db"].as_f64() {
            Some(db) => assert!((a.totals.sqnr_db.unwrap() - db).abs() < 1e-5, "{label} sqnr"),
            None => assert!(a.totals.exact),
        }
        let group_mse = floats(&case["group_mse"]);
        assert_eq!(a.groups.mse.len(), group_mse.len(), "{label} group count");
        for (g, w) in a.groups.mse.iter().zip(&group_mse) {
            assert!(close(f64::from(*g), f64::from(*w), 1e-5), "{label} group mse {g} vs {w}");
        }
        assert_eq!(a.cost.total_bits, case["total_bits"].as_u64().unwrap(), "{label} bits");
        assert_eq!(a.cost.bits_per_weight, case["bits_per_weight"].as_f64().unwrap(), "{label} bits/weight");
    }
}

/// Uniform inputs spread over the grid of an asymmetric b-bit quantizer with step Δ.
fn uniform_case(bits: u8, n: usize) -> (f64, f64, f64) {
    let mut rng = Rng::new(u64::from(bits));
    // Values uniform on [0, 1); per-tensor, the grid spans [0, max] in 2^b − 1 steps.
    let values: Vec<f32> = (0..n).map(|_| rng.uniform() as f32).collect();
    let t = Tensor::from_values("u", DType::F32, Array2::from_shape_vec((1, n), values).unwrap());
    let recipe = Recipe { bits, granularity: Granularity::Tensor, symmetric: false, scale_dtype: ScaleDType::F32, ..Recipe::default() };
    let a = analyze(&t, &recipe).unwrap();
    let step = f64::from(a.params[0].scale);
    (a.totals.mse, step * step / 12.0, a.totals.sqnr_db.unwrap())
}

/// Source: Bennett (1948), "Spectra of quantized signals": for inputs spread uniformly across
/// the cells of a uniform quantizer with step Δ, the noise power is Δ²/12. Hence SQNR grows by
/// 20·log10(Δ_b / Δ_(b+1)) per extra bit, which tends to 20·log10 2 ≈ 6.02 dB (common practice).
#[test]
fn uniform_noise_follows_the_step_squared_over_twelve_rule() {
    let mut previous: Option<(f64, f64)> = None;
    for bits in 2..=8 {
        let (mse, bennett, sqnr) = uniform_case(bits, 400_000);
        assert!((mse / bennett - 1.0).abs() < 0.02, "{bits} bits: mse {mse:e} vs Δ²/12 {bennett:e}");
        let step = (12.0 * bennett).sqrt();
        if let Some((prev_sqnr, prev_step)) = previous {
            let gain = sqnr - prev_sqnr;
            let predicted = 20.0 * (prev_step / step).log10();
            assert!((gain - predicted).abs() < 0.1, "{bits} bits gained {gain:.3} dB, Δ²/12 predicts {predicted:.3}");
            if bits >= 5 {
                assert!((gain - 6.02).abs() < 0.35, "{bits} bits gained {gain:.3} dB, not about 6.02");
            }
        }
        previous = Some((sqnr, step));
    }
}

#[path = "shared/small_float_casts.rs"]
mod small_float_casts;

/// See `tests/shared/small_float_casts.rs` (ml_dtypes 0.5.4 casts).
#[test]
fn small_float_casts_match_ml_dtypes() {
    small_float_casts::check_small_float_casts(&std::fs::read_to_string(fixture("manifest.json")).unwrap());
}

/// Source: QLoRA (Dettmers et al., NeurIPS 2023), section 3 and appendix: NF4's levels are built
/// from normal quantiles (the fixtures script rebuilds them with Python's NormalDist); our table
/// (written from memory of the paper's) agrees to 1e-6.
#[test]
fn nf4_levels_match_the_paper_s_construction() {
    let m = manifest();
    let built = floats(&m["formats"]["nf4_construction"]);
    for (ours, theirs) in bitloupe::formats::NF4_LEVELS.iter().zip(&built) {
        assert!((ours - theirs).abs() < 1e-6, "{ours} vs {theirs}");
    }
}
