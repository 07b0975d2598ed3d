//! Uniform integer grids with round-to-nearest.
//!
//! For a group x of a row and b bits, in f32, rounding half to even and dividing by the scale:
//!
//! * asymmetric: lo = min(min x, 0), hi = max(max x, 0), s = (hi − lo)/(2^b − 1) rounded to
//!   the scale's storage type, z = clamp(round(−lo/s), 0, 2^b − 1),
//!   q = clamp(round(x/s) + z, 0, 2^b − 1), x̂ = (q − z)·s;
//! * symmetric: s = max|x| / (2^(b−1) − 1) rounded to its type, q = clamp(round(x/s),
//!   −2^(b−1), 2^(b−1) − 1), x̂ = q·s.
//!
//! A scale of 0 (an all-zero group) becomes 1; keeping 0 inside [lo, hi] so that zero is exactly
//! representable is common practice. Both modes share one kernel, with z = 0 for symmetric grids.

use crate::error::Error;
use crate::recipe::{Recipe, ScaleDType};
use crate::simd::{as_places, extremes, larger, map_lanes, smaller, F32x4};
use std::mem::MaybeUninit;

/// The fitted parameters of one group.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GroupParams {
    /// Step between grid points, as stored.
    pub scale: f32,
    /// Code of the value 0 (always 0 for symmetric grids); a whole number kept as f32.
    pub zero: f32,
}

/// An integer grid: its code range and how its scale is stored.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IntGrid {
    /// Smallest code.
    pub qmin: f32,
    /// Largest code.
    pub qmax: f32,
    /// Whether the grid is symmetric around zero.
    pub symmetric: bool,
    /// Storage type of the scale.
    pub scale_dtype: ScaleDType,
}

/// A group that cannot be given a scale.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScaleOverflow {
    /// The scale that was needed.
    pub scale: f32,
    /// The scale fits its type (or the values span more than f32 itself), but the grid's far
    /// end would pass the largest f32: no scale type helps.
    pub beyond_f32: bool,
}

impl ScaleOverflow {
    /// A scale too large for its storage type.
    pub fn of(scale: f32) -> Self {
        ScaleOverflow { scale, beyond_f32: false }
    }

    /// Whether a grid whose largest level magnitude is `reach` (the scale included) stays within
    /// f32; the values of a group cannot reach further than its grid.
    pub fn check_reach(reach: f32, scale: f32) -> Result<(), ScaleOverflow> {
        if reach.is_finite() { Ok(()) } else { Err(ScaleOverflow { scale, beyond_f32: true }) }
    }

    /// The core error for this overflow in the group starting at (row, col).
    pub fn at(self, scale_dtype: ScaleDType, row: usize, col: usize) -> Error {
        Error::ScaleOverflow { scale: self.scale, dtype: scale_dtype.name(), row, col, beyond_f32: self.beyond_f32 }
    }
}

impl IntGrid {
    /// The grid a recipe describes.
    pub fn new(recipe: &Recipe) -> Self {
        let levels = (1u32 << recipe.bits) as f32;
        let (qmin, qmax) = if recipe.symmetric { (-levels / 2.0, levels / 2.0 - 1.0) } else { (0.0, levels - 1.0) };
        IntGrid { qmin, qmax, symmetric: recipe.symmetric, scale_dtype: recipe.scale_dtype }
    }

    /// Fit the scale (and zero point) of one group from its value range.
    pub fn fit(&self, group: &[f32]) -> Result<GroupParams, ScaleOverflow> {
        let (lo, hi) = min_max(group);
        self.fit_range(lo, hi)
    }

    /// Fit to the range [lo, hi] with lo ≤ 0 ≤ hi (a clipped range, for example).
    pub fn fit_range(&self, lo: f32, hi: f32) -> Result<GroupParams, ScaleOverflow> {
        let raw = if self.symmetric { larger(-lo, hi) / self.qmax } else { (hi - lo) / self.qmax };
        // A range wider than f32 (hi − lo overflows) has no scale, whatever the scale type.
        ScaleOverflow::check_reach(raw, raw)?;
        let scale = if raw == 0.0 { 1.0 } else { self.scale_dtype.round_scale(raw).ok_or(ScaleOverflow::of(raw))? };
        let zero = if self.symmetric { 0.0 } else { smaller(larger((-lo / scale).round_ties_even(), 0.0), self.qmax) };
        // A scale rounded up (to a power of two, say) can put the grid's far end beyond f32.
        ScaleOverflow::check_reach(larger(larger(-self.qmin, self.qmax - zero), zero) * scale, scale)?;
        Ok(GroupParams { scale, zero })
    }

    /// Quantize and dequantize `x` into `out` (the fast kernel; the same arithmetic as
    /// [`IntGrid::dequantize_one`], four values at a time).
    pub fn quantize_into(&self, p: GroupParams, x: &[f32], out: &mut [f32]) {
        self.write_quantized(p, x, as_places(out));
    }

    /// [`IntGrid::quantize_into`] into fresh memory: writes every place of `out`.
    pub(crate) fn write_quantized(&self, p: GroupParams, x: &[f32], out: &mut [MaybeUninit<f32>]) {
        let (scale, zero) = (F32x4::splat(p.scale), F32x4::splat(p.zero));
        let (qmin, qmax) = (F32x4::splat(self.qmin), F32x4::splat(self.qmax));
        map_lanes(x, out, |v| {
            let q = (round_half_even_lanes(v / scale) + zero).max(qmin).min(qmax);
            (q - zero) * scale
        });
    }

    /// Quantize and dequantize one value.
    #[inline(always)]
    pub fn dequantize_one(&self, p: GroupParams, v: f32) -> f32 {
        let q = (round_half_even_small(v / p.scale) + p.zero).clamp(self.qmin, self.qmax);
        (q - p.zero) * p.scale
    }

    /// The code of one value, the plain scalar reference the fast kernel is tested against.
    pub fn code_reference(&self, p: GroupParams, v: f32) -> f32 {
        ((v / p.scale).round_ties_even() + p.zero).clamp(self.qmin, self.qmax)
    }
}

/// Smallest and largest value of a slice and 0 ((0, 0) for an empty one, which then gets scale 1).
#[inline(always)]
pub fn min_max(x: &[f32]) -> (f32, f32) {
    extremes(x, 0.0)
}

/// 1.5 · 2^23: adding and subtracting it rounds an f32 below 2^22 in magnitude to an integer.
const ROUNDING_MAGIC: f32 = 12_582_912.0;
/// 2^20: the clamp that keeps [`ROUNDING_MAGIC`] exact.
const ROUNDING_LIMIT: f32 = 1_048_576.0;

/// Round half to even for values whose result is later clamped to a small code range.
///
/// Adding and subtracting 1.5·2^23 rounds an f32 of magnitude below 2^22 to an integer with the
/// current rounding mode, which is round-to-nearest-even (IEEE 754). Clamping first to ±2^20
/// changes nothing after the caller's clamp to at most ±256 and keeps the trick exact; it avoids
/// a library call on targets without a rounding instruction.
#[inline(always)]
pub(crate) fn round_half_even_small(y: f32) -> f32 {
    (y.clamp(-ROUNDING_LIMIT, ROUNDING_LIMIT) + ROUNDING_MAGIC) - ROUNDING_MAGIC
}

/// [`round_half_even_small`] on four lanes.
#[inline(always)]
pub(crate) fn round_half_even_lanes(y: F32x4) -> F32x4 {
    let magic = F32x4::splat(ROUNDING_MAGIC);
    (y.max(F32x4::splat(-ROUNDING_LIMIT)).min(F32x4::splat(ROUNDING_LIMIT)) + magic) - magic
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::recipe::Granularity;

    fn grid(bits: u8, symmetric: bool) -> IntGrid {
        IntGrid::new(&Recipe { bits, symmetric, granularity: Granularity::Row, scale_dtype: ScaleDType::F32, ..Recipe::default() })
    }

    #[test]
    fn fast_rounding_matches_round_ties_even() {
        let mut values: Vec<f32> = (-2000..=2000).map(|i| i as f32 * 0.25).collect();
        values.extend([0.5, 1.5, 2.5, -0.5, -2.5, 1e7, -1e7, 3.4e38, -0.0, 0.49999997, 8388607.5]);
        for v in values {
            let fast = round_half_even_small(v).clamp(-256.0, 256.0);
            assert_eq!(fast, v.round_ties_even().clamp(-256.0, 256.0), "value {v}");
        }
    }

    #[test]
    fn fast_kernel_matches_the_scalar_reference_over_odd_sizes() {
        let mut rng = crate::demo::Rng::new(7);
        for bits in 2..=8 {
            for symmetric in [false, true] {
                let g = grid(bits, symmetric);
                for len in [0usize, 1, 7, 8, 9, 127, 129] {
                    let x: Vec<f32> = (0..len).map(|_| rng.normal() as f32 * 3.0 + 0.5).collect();
                    let p = g.fit(&x).unwrap();
                    let mut out = vec![0f32; len];
                    g.quantize_into(p, &x, &mut out);
                    for (&v, &o) in x.iter().zip(&out) {
                        assert_eq!(o, (g.code_reference(p, v) - p.zero) * p.scale);
                    }
                }
            }
        }
    }

    #[test]
    fn asymmetric_fit_follows_the_stated_rule() {
        // 2 bits: 4 levels over [-1, 2]: scale 1, zero 1, codes of -1, 0.4, 2 are 0, 1, 3.
        let g = grid(2, false);
        let p = g.fit(&[-1.0, 0.4, 2.0]).unwrap();
        assert_eq!(p, GroupParams { scale: 1.0, zero: 1.0 });
        // An all-positive group still includes 0: [0, 3] over 3 steps.
        assert_eq!(g.fit(&[1.0, 3.0]).unwrap(), GroupParams { scale: 1.0, zero: 0.0 });
        assert_eq!(g.fit(&[0.0, 0.0]).unwrap(), GroupParams { scale: 1.0, zero: 0.0 });
    }

    #[test]
    fn symmetric_grid_uses_the_negative_extra_code() {
        let g = grid(4, true);
        assert_eq!((g.qmin, g.qmax), (-8.0, 7.0));
        let p = g.fit(&[-14.0, 7.0]).unwrap();
        assert_eq!(p.scale, 2.0);
        let mut out = [0f32; 2];
        g.quantize_into(p, &[-14.0, 7.0], &mut out);
        assert_eq!(out, [-14.0, 8.0]);
    }

    /// A power-of-two scale still covers the group: int8 symmetric with an E8M0 scale for a
    /// largest magnitude of 2.494 (2.494/127 ≈ 2^−5.67) gets 2^−5, so −2.494 comes back within
    /// half a step; the nearest power, 2^−6, would have clipped it to −128 · 2^−6 = −2.
    #[test]
    fn power_of_two_scales_cover_the_group() {
        let g = IntGrid::new(&Recipe { bits: 8, symmetric: true, scale_dtype: ScaleDType::E8M0, ..Recipe::default() });
        let x = [-2.494f32, 0.7, 1.9];
        let p = g.fit(&x).unwrap();
        assert_eq!(p.scale, 2f32.powi(-5));
        let mut out = [0f32; 3];
        g.quantize_into(p, &x, &mut out);
        for (v, q) in x.iter().zip(out) {
            assert!((v - q).abs() <= p.scale / 2.0, "{v} came back as {q}");
        }
    }

    #[test]
    fn overflowing_scales_are_reported() {
        let g = IntGrid::new(&Recipe { bits: 2, ..Recipe::default() });
        assert!(g.fit(&[0.0, 1e6]).is_err());
        // f32::MAX is 3.40e38 = (2 − 2⁻²³)·2¹²⁷ (IEEE 754 binary32). A range wider than that
        // has no scale of any type (E8M0's clamp to 2¹²⁷ used to hide it); a symmetric 4-bit
        // grid for 3e38 gets the E8M0 scale 2¹²⁶ (3e38/7 ≈ 2^125.01, rounded up), whose code −8
        // stands for −2¹²⁹, beyond f32. Both are refused rather than reconstructed as infinities.
        let e8m0 = IntGrid::new(&Recipe { scale_dtype: ScaleDType::E8M0, ..Recipe::default() });
        assert!(e8m0.fit(&[-3e38, 3e38]).is_err());
        let f32_scales = IntGrid::new(&Recipe { scale_dtype: ScaleDType::F32, ..Recipe::default() });
        assert!(f32_scales.fit(&[-3e38, 3e38]).is_err());
        let e8m0_sym = IntGrid::new(&Recipe { scale_dtype: ScaleDType::E8M0, symmetric: true, ..Recipe::default() });
        let beyond = e8m0_sym.fit(&[0.0, 3e38]).unwrap_err();
        assert_eq!(beyond, ScaleOverflow { scale: 2f32.powi(126), beyond_f32: true });
        let message = beyond.at(ScaleDType::E8M0, 4, 256).to_string();
        assert!(message.contains("row 4, column 256") && message.contains("no scale type helps"), "{message}");
        assert!(!g.fit(&[0.0, 1e6]).unwrap_err().beyond_f32, "a 2-bit f16 scale of 3.3e5 is too large for f16 alone");
        let fits = e8m0.fit(&[0.0, 3e38]).unwrap();
        assert_eq!(fits.scale, 2f32.powi(124));
        assert!(((15.0 - fits.zero) * fits.scale).is_finite());
    }

    #[test]
    fn min_max_includes_zero() {
        assert_eq!(min_max(&[]), (0.0, 0.0));
        assert_eq!(min_max(&[3.0; 11]), (0.0, 3.0));
        let x: Vec<f32> = (0..19).map(|i| i as f32 - 4.0).collect();
        assert_eq!(min_max(&x), (-4.0, 14.0));
    }
}
