//! Number formats: what values a quantized element can take and how a group's scale is chosen.
//!
//! * `int`: the uniform integer grids of `grid` (scale and zero point from min/max);
//! * `nf4`: the 16 normal-float levels of QLoRA (Dettmers et al., NeurIPS 2023), scaled by the
//!   block's absmax, each value mapped to the nearest level;
//! * small floats E2M1, E2M3, E3M2, E4M3, E5M2 (`minifloat`), scaled so that the group's largest
//!   magnitude lands on the format's maximum: s = max|x| / max, rounded to the scale's type;
//! * MX blocks (OCP Microscaling Formats v1.0): 32 elements share one E8M0 power-of-two scale
//!   X = 2^(⌊log2 max|x|⌋ − emax_elem), elements are x/X rounded (saturating) to the element type;
//!   MXINT8 elements are 8-bit two's-complement integers times 2⁻⁶;
//! * `codebook` (`codebook`): 2^b levels fitted to the weights by Lloyd–Max.
//!
//! Every scaled format goes through one group loop with `fit` and `dequantize_one`, so the
//! clipping search and kept values work with all of them.

pub mod codebook;
pub mod minifloat;

use crate::error::{Error, Result};
use crate::grid::{min_max, round_half_even_lanes, GroupParams, IntGrid, ScaleOverflow};
use crate::simd::{map_lanes, F32x4};
use crate::recipe::{Granularity, Recipe, ScaleDType};
use minifloat::{MiniFloat, E2M1, E2M3, E3M2, E4M3, E5M2};
use serde::{Deserialize, Serialize};
use std::str::FromStr;

/// The number format of the quantized elements.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Format {
    /// Uniform integer grid of the recipe's bits.
    Int,
    /// 4-bit normal float.
    Nf4,
    /// FP4 E2M1 with a group scale.
    E2m1,
    /// FP6 E2M3 with a group scale.
    E2m3,
    /// FP6 E3M2 with a group scale.
    E3m2,
    /// FP8 E4M3 with a group scale.
    E4m3,
    /// FP8 E5M2 with a group scale.
    E5m2,
    /// MX block of 32 E2M1 elements.
    Mxfp4,
    /// MX block of 32 E2M3 elements.
    Mxfp6e2m3,
    /// MX block of 32 E3M2 elements.
    Mxfp6e3m2,
    /// MX block of 32 E4M3 elements.
    Mxfp8e4m3,
    /// MX block of 32 E5M2 elements.
    Mxfp8e5m2,
    /// MX block of 32 INT8 elements.
    Mxint8,
    /// 2^b levels fitted per tensor or per row.
    Codebook,
}

/// The MX specification's block size.
pub const MX_BLOCK: usize = 32;

/// The 16 NF4 levels (QLoRA paper, appendix; from memory of the published table, and checked in
/// the tests against the paper's construction from normal quantiles).
pub const NF4_LEVELS: [f32; 16] = [
    -1.0,
    -0.696_192_8,
    -0.525_073_05,
    -0.394_917_5,
    -0.284_441_38,
    -0.184_773_43,
    -0.091_050_036,
    0.0,
    0.079_580_3,
    0.160_930_2,
    0.246_112_3,
    0.337_915_24,
    0.440_709_83,
    0.562_617,
    0.722_956_84,
    1.0,
];

impl Format {
    /// Every name the command line accepts, in order.
    pub const NAMES: &'static str = "int, nf4, e2m1, e2m3, e3m2, e4m3, e5m2, mxfp4, mxfp6e2m3, mxfp6e3m2, mxfp8e4m3, mxfp8e5m2, mxint8, codebook";

    /// Lower-case name.
    pub fn name(self) -> &'static str {
        match self {
            Format::Int => "int",
            Format::Nf4 => "nf4",
            Format::E2m1 => "e2m1",
            Format::E2m3 => "e2m3",
            Format::E3m2 => "e3m2",
            Format::E4m3 => "e4m3",
            Format::E5m2 => "e5m2",
            Format::Mxfp4 => "mxfp4",
            Format::Mxfp6e2m3 => "mxfp6e2m3",
            Format::Mxfp6e3m2 => "mxfp6e3m2",
            Format::Mxfp8e4m3 => "mxfp8e4m3",
            Format::Mxfp8e5m2 => "mxfp8e5m2",
            Format::Mxint8 => "mxint8",
            Format::Codebook => "codebook",
        }
    }

    /// The small-float element type, for the float and MX formats.
    pub fn element(self) -> Option<MiniFloat> {
        match self {
            Format::E2m1 | Format::Mxfp4 => Some(E2M1),
            Format::E2m3 | Format::Mxfp6e2m3 => Some(E2M3),
            Format::E3m2 | Format::Mxfp6e3m2 => Some(E3M2),
            Format::E4m3 | Format::Mxfp8e4m3 => Some(E4M3),
            Format::E5m2 | Format::Mxfp8e5m2 => Some(E5M2),
            _ => None,
        }
    }

    /// Whether this is one of the OCP MX block formats.
    pub fn is_mx(self) -> bool {
        matches!(self, Format::Mxfp4 | Format::Mxfp6e2m3 | Format::Mxfp6e3m2 | Format::Mxfp8e4m3 | Format::Mxfp8e5m2 | Format::Mxint8)
    }

    /// Bits per element, given the recipe's bits (used by int and codebook only).
    pub fn element_bits(self, recipe_bits: u8) -> u32 {
        match self {
            Format::Int | Format::Codebook => u32::from(recipe_bits),
            Format::Nf4 => 4,
            Format::Mxint8 => 8,
            f => f.element().expect("a small-float format").bits,
        }
    }

    /// Check the recipe's other choices against this format.
    pub fn validate(self, recipe: &Recipe) -> Result<()> {
        let bad = |detail: String| Err(Error::BadRecipe { detail });
        if self.is_mx() {
            if recipe.granularity != Granularity::Group(MX_BLOCK) {
                return bad(format!("{} shares one scale per block of {MX_BLOCK} (the MX specification); use groups of {MX_BLOCK}", self.name()));
            }
            if recipe.scale_dtype != ScaleDType::E8M0 {
                return bad(format!("{} stores its block scale as E8M0; choose that scale type", self.name()));
            }
        } else if recipe.scale_dtype == ScaleDType::E8M0 && self != Format::Codebook {
            return bad("E8M0 scales belong to the MX formats".into());
        }
        match self {
            Format::Codebook => {
                if !codebook::BITS.contains(&recipe.bits) {
                    return bad(format!("a codebook of {} bits is outside {}..={}", recipe.bits, codebook::BITS.start(), codebook::BITS.end()));
                }
                if !matches!(recipe.granularity, Granularity::Tensor | Granularity::Row) {
                    return bad("a codebook is fitted per tensor or per row".into());
                }
            }
            Format::Int => {}
            _ if recipe.symmetric => {}
            _ => return bad(format!("{} is symmetric around zero: choose the symmetric grid", self.name())),
        }
        Ok(())
    }
}

impl FromStr for Format {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        let s = s.trim().to_ascii_lowercase();
        serde_json::from_value(serde_json::Value::String(s.clone()))
            .map_err(|_| Error::BadRecipe { detail: format!("format '{s}' is not one of {}", Format::NAMES) })
    }
}

/// A scaled format ready to fit and quantize groups.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Grid {
    /// Uniform integer grid.
    Int(IntGrid),
    /// Scaled levels: NF4 or a small float, scale stored in `scale_dtype`.
    Scaled {
        /// The format.
        format: Format,
        /// Storage type of the scale.
        scale_dtype: ScaleDType,
    },
    /// An MX block format.
    Mx(Format),
}

impl Grid {
    /// The grid of a recipe (not for codebooks, which fit their own levels).
    pub fn new(recipe: &Recipe) -> Self {
        match recipe.format {
            Format::Int => Grid::Int(IntGrid::new(recipe)),
            f if f.is_mx() => Grid::Mx(f),
            format => Grid::Scaled { format, scale_dtype: recipe.scale_dtype },
        }
    }

    /// The largest magnitude of the format's unit levels.
    fn unit_max(format: Format) -> f32 {
        match format {
            Format::Nf4 => 1.0,
            f => f.element().map_or(1.0, |e| e.max),
        }
    }

    /// Fit a group from its values.
    pub fn fit(&self, x: &[f32]) -> std::result::Result<GroupParams, ScaleOverflow> {
        let (lo, hi) = min_max(x);
        self.fit_range(lo, hi)
    }

    /// Fit to the range [lo, hi] (lo ≤ 0 ≤ hi), for example a clipped one.
    pub fn fit_range(&self, lo: f32, hi: f32) -> std::result::Result<GroupParams, ScaleOverflow> {
        let absmax = crate::simd::larger(-lo, hi);
        match *self {
            Grid::Int(g) => g.fit_range(lo, hi),
            Grid::Scaled { format, scale_dtype } => {
                let raw = absmax / Self::unit_max(format);
                let scale = if raw == 0.0 { 1.0 } else { scale_dtype.round_scale(raw).ok_or(ScaleOverflow::of(raw))? };
                // A scale rounded up (to bf16's eight bits, say) can carry the grid's end past f32.
                ScaleOverflow::check_reach(Self::unit_max(format) * scale, scale)?;
                Ok(GroupParams { scale, zero: 0.0 })
            }
            Grid::Mx(format) => {
                let scale = mx_scale(format, absmax);
                // MXINT8's most negative code is −2 (−128 · 2⁻⁶), a step beyond its largest positive one.
                let unit = if format == Format::Mxint8 { 2.0 } else { Self::unit_max(format) };
                ScaleOverflow::check_reach(unit * scale, scale)?;
                Ok(GroupParams { scale, zero: 0.0 })
            }
        }
    }

    /// Quantize and dequantize one value.
    #[inline]
    pub fn dequantize_one(&self, p: GroupParams, v: f32) -> f32 {
        let mut out = [0f32];
        self.quantize_into(p, &[v], &mut out);
        out[0]
    }

    /// Quantize and dequantize a group (the format is matched once, outside the loop).
    pub fn quantize_into(&self, p: GroupParams, x: &[f32], out: &mut [f32]) {
        self.write_quantized(p, x, crate::simd::as_places(out));
    }

    /// [`Grid::quantize_into`] into fresh memory: writes every place of `out`.
    pub(crate) fn write_quantized(&self, p: GroupParams, x: &[f32], out: &mut [std::mem::MaybeUninit<f32>]) {
        let s = F32x4::splat(p.scale);
        match *self {
            Grid::Int(g) => g.write_quantized(p, x, out),
            Grid::Scaled { format: Format::Nf4, .. } => {
                // The nearest level is the one past the last midpoint below u (ties go down):
                // a select per midpoint, in ascending order, keeps the kernel free of lookups.
                let mids = midpoints(&NF4_LEVELS);
                map_lanes(x, out, |v| {
                    let u = v / s;
                    let level = mids.iter().zip(&NF4_LEVELS[1..]).fold(F32x4::splat(NF4_LEVELS[0]), |level, (&mid, &next)| {
                        u.above(F32x4::splat(mid), F32x4::splat(next), level)
                    });
                    level * s
                });
            }
            Grid::Mx(Format::Mxint8) => {
                // Codes −128..=127 in steps of 1/64 (OCP MX v1.0, MXINT8), rounded half to even.
                let (step, low, high) = (F32x4::splat(64.0), F32x4::splat(-128.0), F32x4::splat(127.0));
                map_lanes(x, out, |v| round_half_even_lanes(v / s * step).max(low).min(high) / step * s);
            }
            Grid::Scaled { format, .. } | Grid::Mx(format) => {
                let element = format.element().expect("a small float");
                map_lanes(x, out, |v| element.round_lanes(v / s) * s);
            }
        }
    }

    /// Every value the group with parameters `p` can take, ascending.
    pub fn points(&self, p: GroupParams) -> Vec<f32> {
        let unit: Vec<f32> = match *self {
            Grid::Int(g) => return (g.qmin as i32..=g.qmax as i32).map(|q| (q as f32 - p.zero) * p.scale).collect(),
            Grid::Scaled { format: Format::Nf4, .. } => NF4_LEVELS.to_vec(),
            Grid::Mx(Format::Mxint8) => (-128..=127).map(|q| q as f32 / 64.0).collect(),
            Grid::Scaled { format, .. } | Grid::Mx(format) => {
                let positive = format.element().expect("a small float").positive_values();
                positive.iter().rev().map(|v| -v).filter(|v| *v < 0.0).chain(positive.iter().copied()).collect()
            }
        };
        unit.iter().map(|u| u * p.scale).collect()
    }
}

/// NF4 block constants after QLoRA's double quantization: their mean, then blocks of 256 as
/// 8-bit symmetric integers with one f32 absmax step each.
#[derive(Debug, Clone, PartialEq)]
pub struct DoubleQuantized {
    /// Mean of the constants (they are all positive).
    pub mean: f32,
    /// One step per block of 256 constants.
    pub steps: Vec<f32>,
    /// One 8-bit code per constant.
    pub codes: Vec<i8>,
}

impl DoubleQuantized {
    /// Quantize the scales of `params`.
    pub fn of(params: &[GroupParams]) -> Self {
        let mean = if params.is_empty() { 0.0 } else { (params.iter().map(|p| f64::from(p.scale)).sum::<f64>() / params.len() as f64) as f32 };
        let mut steps = Vec::new();
        let mut codes = Vec::with_capacity(params.len());
        for block in params.chunks(crate::cost::DOUBLE_QUANT_BLOCK as usize) {
            let absmax = block.iter().fold(0f32, |m, p| m.max((p.scale - mean).abs()));
            let step = if absmax == 0.0 { 1.0 } else { absmax / 127.0 };
            steps.push(step);
            codes.extend(block.iter().map(|p| ((p.scale - mean) / step).round_ties_even().clamp(-127.0, 127.0) as i8));
        }
        DoubleQuantized { mean, steps, codes }
    }

    /// The constants they stand for (a constant that would come back as zero or below keeps
    /// the smallest positive f32).
    pub fn scales(&self) -> Vec<f32> {
        let block = crate::cost::DOUBLE_QUANT_BLOCK as usize;
        self.codes.iter().enumerate().map(|(i, &c)| (f32::from(c) * self.steps[i / block] + self.mean).max(f32::MIN_POSITIVE)).collect()
    }
}

/// Midpoints between neighbouring levels (levels ascending).
pub fn midpoints(levels: &[f32]) -> Vec<f32> {
    levels.windows(2).map(|w| (w[0] + w[1]) / 2.0).collect()
}

/// The nearest level: the one whose cell between midpoints holds `u` (ties go down).
#[inline]
pub fn nearest_level(levels: &[f32], mids: &[f32], u: f32) -> f32 {
    levels[mids.partition_point(|&m| m < u)]
}

/// The E8M0 shared scale of an MX block whose largest magnitude is `absmax`:
/// 2^(⌊log2 absmax⌋ − emax_elem), clamped to E8M0's range 2⁻¹²⁷…2¹²⁷ (OCP MX v1.0, section 6.3).
pub fn mx_scale(format: Format, absmax: f32) -> f32 {
    let emax = match format {
        Format::Mxint8 => 0,
        f => f.element().expect("an MX format").max_exponent,
    };
    if absmax == 0.0 {
        return 2f32.powi(-127);
    }
    let exponent = (f64::from(absmax).log2().floor() as i32 - emax).clamp(-127, 127);
    2f64.powi(exponent) as f32
}

#[cfg(test)]
mod tests {
    use super::*;

    /// MXINT8's codes run from −128 to 127 in steps of 2⁻⁶ (OCP Microscaling Formats v1.0, from
    /// memory): for a block whose largest magnitude is 3.39e38 the shared scale is 2¹²⁷, and
    /// the code −128 would stand for −2¹²⁸, beyond f32's 3.40e38. Refused, not reconstructed as −∞.
    #[test]
    fn a_grid_beyond_f32_is_refused() {
        let mx = Grid::new(&Recipe::for_format(Format::Mxint8));
        assert!(mx.fit(&[1.0, -3.39e38]).is_err_and(|e| e.beyond_f32));
        assert!(mx.fit(&[1.0, -1e38]).is_ok());
        // Every grid, every scale type, values up to f32::MAX (3.4028235e38): a group is either
        // refused or reconstructed finite, never as an infinity.
        use crate::recipe::ScaleDType;
        let formats = [Format::Int, Format::Nf4, Format::E2m1, Format::E2m3, Format::E3m2, Format::E4m3, Format::E5m2, Format::Mxfp4, Format::Mxint8];
        let mut refused = 0;
        for format in formats {
            for scale_dtype in [ScaleDType::F16, ScaleDType::BF16, ScaleDType::F32, ScaleDType::E8M0] {
                for symmetric in [false, true] {
                    let grid = Grid::new(&Recipe { symmetric, scale_dtype, ..Recipe::for_format(format) });
                    for v in [f32::MAX, 3.39e38, 3.3e38, 3.0e38, 2.5e38, 1.7e38] {
                        for group in [[v, -v], [v, 0.0], [0.0, -v]] {
                            match grid.fit(&group) {
                                Ok(p) => assert!(group.iter().all(|&x| grid.dequantize_one(p, x).is_finite()), "{format:?} {scale_dtype:?} {symmetric} {group:?}"),
                                Err(_) => refused += 1,
                            }
                        }
                    }
                }
            }
        }
        assert!(refused > 0);
    }

    #[test]
    fn names_round_trip_and_bad_recipes_are_explained() {
        for name in Format::NAMES.split(", ") {
            assert_eq!(name.parse::<Format>().unwrap().name(), name);
        }
        assert!("fp5".parse::<Format>().is_err());
        let mx = Recipe { format: Format::Mxfp4, symmetric: true, scale_dtype: ScaleDType::E8M0, granularity: Granularity::Group(64), ..Recipe::default() };
        assert!(mx.validate().unwrap_err().to_string().contains("block of 32"));
        let cb = Recipe { format: Format::Codebook, bits: 9, granularity: Granularity::Row, ..Recipe::default() };
        assert!(cb.validate().unwrap_err().to_string().contains("9 bits"));
        let asym = Recipe { format: Format::E4m3, ..Recipe::default() };
        assert!(asym.validate().unwrap_err().to_string().contains("symmetric"));
    }

    /// Source: OCP MX v1.0, section 6.3: X = 2^(⌊log2(max|V|)⌋ − emax_elem), worked by hand.
    #[test]
    fn mx_block_scale_follows_the_specification() {
        // max |V| = 5.5: ⌊log2 5.5⌋ = 2; E2M1's emax is 2, so X = 2⁰ = 1 and 5.5 rounds to 6.
        assert_eq!(mx_scale(Format::Mxfp4, 5.5), 1.0);
        // max |V| = 100: ⌊log2 100⌋ = 6; E4M3's emax is 8, so X = 2⁻².
        assert_eq!(mx_scale(Format::Mxfp8e4m3, 100.0), 0.25);
        // MXINT8's elements span [−2, 2): emax 0, so max |V| = 3 gives X = 2¹.
        assert_eq!(mx_scale(Format::Mxint8, 3.0), 2.0);
        let grid = Grid::Mx(Format::Mxfp4);
        let p = grid.fit(&[5.5, -0.2, 1.3]).unwrap();
        assert_eq!([5.5, -0.2, 1.3].map(|v| grid.dequantize_one(p, v)), [6.0, 0.0, 1.5]);
    }

    #[test]
    fn scaled_formats_put_the_largest_magnitude_on_the_format_maximum() {
        let grid = Grid::Scaled { format: Format::E2m1, scale_dtype: ScaleDType::F32 };
        let p = grid.fit(&[-3.0, 1.0, 0.4]).unwrap();
        assert_eq!(p.scale, 0.5);
        assert_eq!(grid.dequantize_one(p, -3.0), -3.0);
        let nf4 = Grid::Scaled { format: Format::Nf4, scale_dtype: ScaleDType::F32 };
        let p = nf4.fit(&[2.0, -1.0, 0.1]).unwrap();
        assert_eq!(nf4.dequantize_one(p, 2.0), 2.0);
        assert_eq!(nf4.points(p).len(), 16);
        assert_eq!(Grid::Mx(Format::Mxfp8e4m3).points(GroupParams { scale: 1.0, zero: 0.0 }).len(), 2 * 127 - 1);
        // The fast NF4 search agrees with the nearest-level rule everywhere, ties included.
        let unit = GroupParams { scale: 1.0, zero: 0.0 };
        let mids = midpoints(&NF4_LEVELS);
        let probes: Vec<f32> = (-1100..=1100).map(|i| i as f32 / 1000.0).chain(mids.iter().copied()).collect();
        for u in probes {
            assert_eq!(nf4.dequantize_one(unit, u), nearest_level(&NF4_LEVELS, &mids, u), "{u}");
        }
    }

    /// The four-lane kernels against plain scalar definitions, over lengths that leave every
    /// possible tail (0–3 values past the last whole vector), including 0.
    #[test]
    fn format_kernels_match_the_scalar_definitions_over_odd_lengths() {
        let mut rng = crate::demo::Rng::new(11);
        let mids = midpoints(&NF4_LEVELS);
        for name in Format::NAMES.split(", ").filter(|&n| n != "int" && n != "codebook") {
            let format: Format = name.parse().unwrap();
            let grid = Grid::new(&Recipe::for_format(format));
            let reference = |p: GroupParams, v: f32| -> f32 {
                let u = v / p.scale;
                match format {
                    Format::Nf4 => nearest_level(&NF4_LEVELS, &mids, u) * p.scale,
                    // OCP MX v1.0: MXINT8 elements are 8-bit two's complement codes times 2⁻⁶.
                    Format::Mxint8 => (u * 64.0).round_ties_even().clamp(-128.0, 127.0) / 64.0 * p.scale,
                    f => f.element().unwrap().round(u) * p.scale,
                }
            };
            for len in [0usize, 1, 2, 3, 4, 5, 31, 32, 33, 130] {
                let x: Vec<f32> = (0..len).map(|_| rng.normal() as f32 * 0.3).collect();
                let p = grid.fit(&x).unwrap();
                let mut out = vec![f32::NAN; len];
                grid.quantize_into(p, &x, &mut out);
                for (i, (&v, &o)) in x.iter().zip(&out).enumerate() {
                    assert_eq!(o.to_bits(), reference(p, v).to_bits(), "{name}, length {len}, value {i} ({v})");
                }
            }
        }
    }
}
