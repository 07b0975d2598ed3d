//! The bit budget of a quantized tensor, counted exactly.
//!
//! total = n·b (payload) + G·s (one scale of s bits per group) + G·b (one b-bit zero point per
//! group, asymmetric grids only), with G groups; a group shorter than the group size still stores
//! a whole scale. Example: 4-bit asymmetric, groups of 128, f16 scales costs
//! 4 + (16 + 4)/128 = 4.15625 bits per weight when every row is a multiple of 128 long.
//!
//! Other formats: small floats and NF4 store one scale per group and no zero point; MX formats
//! one 8-bit E8M0 scale per block of 32 (MXFP4: 4 + 8/32 = 4.25 bits per weight); NF4 with
//! double quantization stores 8-bit block constants plus one f32 per 256 of them (QLoRA's
//! 4 + 8/64 + 32/(64·256) ≈ 4.127 bits per weight) and one f32 mean per tensor; a codebook
//! stores 2^b f16 levels per tensor or per row.
//!
//! Further parts, when the recipe has them:
//! * HQQ's zero points are real numbers, stored in the scale's type instead of b bits;
//! * kept values cost 16 bits each plus their index: one u32 per kept column, or one u32
//!   row-major flat index per kept weight (the dense codes still cover every position);
//! * per-column factors of smoothing or AWQ cost one f32 per input column unless they are
//!   folded into the previous layer (we count them; folding makes them free).

use crate::formats::{codebook, Format};
use crate::methods::keep::kept_count;
use crate::recipe::{Granularity, Method, Recipe};

/// Block constants per f32 constant in NF4's double quantization (QLoRA).
pub const DOUBLE_QUANT_BLOCK: u64 = 256;
use serde::Serialize;

/// Bits of one kept value (f16).
const KEPT_VALUE_BITS: u64 = 16;
/// Bits of one stored index (u32).
const INDEX_BITS: u64 = 32;
/// Bits of one per-column factor (f32, so that the packed file reproduces Ŵ exactly).
const COLUMN_FACTOR_BITS: u64 = 32;

/// Where the bits go.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct BitCost {
    /// Quantized elements.
    pub elements: u64,
    /// Groups (each stores one scale, and a zero point when asymmetric).
    pub groups: u64,
    /// Bits of the codes.
    pub payload_bits: u64,
    /// Bits of the stored scales.
    pub scale_bits: u64,
    /// Bits of the stored zero points.
    pub zero_point_bits: u64,
    /// Values kept in 16-bit.
    pub kept_values: u64,
    /// Bits of the kept values and their indices.
    pub kept_bits: u64,
    /// Bits of per-column factors (smoothing, AWQ).
    pub column_factor_bits: u64,
    /// Sum of the parts.
    pub total_bits: u64,
    /// Whole bytes needed to hold `total_bits`.
    pub bytes: u64,
    /// total_bits / elements.
    pub bits_per_weight: f64,
    /// Bits of the same elements in the source type.
    pub source_bits: u64,
    /// How many times smaller than the source (source bits / total bits).
    pub ratio_to_source: f64,
    /// How many times smaller than the same elements in 16-bit.
    pub ratio_to_16bit: f64,
}

impl BitCost {
    /// The cost of `recipe` on a [rows, cols] tensor stored in `source_bits_per_element`.
    pub fn of(recipe: &Recipe, rows: usize, cols: usize, source_bits_per_element: u32) -> Self {
        Self::of_shape(recipe, rows as u64, cols as u64, source_bits_per_element)
    }

    /// [`BitCost::of`] in 64-bit arithmetic, for whole-model sizes beyond one tensor in memory.
    pub fn of_shape(recipe: &Recipe, rows: u64, cols: u64, source_bits_per_element: u32) -> Self {
        let elements = rows * cols;
        let groups = match recipe.granularity {
            Granularity::Tensor => u64::from(elements > 0),
            // An empty row holds no group, as with the other granularities.
            Granularity::Row => rows * u64::from(cols > 0),
            Granularity::Group(g) => rows * cols.div_ceil(g as u64),
        };
        let bits = u64::from(recipe.format.element_bits(recipe.bits));
        let payload_bits = elements * bits;
        let scale_type_bits = u64::from(recipe.scale_dtype.bits());
        let scale_bits = match recipe.format {
            Format::Codebook => groups * (1u64 << recipe.bits) * codebook::LEVEL_BITS,
            Format::Nf4 if recipe.double_quant => {
                // 8-bit codes of the block constants, one f32 per 256 of them, and their f32 mean.
                groups * 8 + groups.div_ceil(DOUBLE_QUANT_BLOCK) * 32 + if groups > 0 { 32 } else { 0 }
            }
            _ => groups * scale_type_bits,
        };
        let zero_point_bits = match (recipe.format, recipe.symmetric, recipe.method) {
            (Format::Int, false, Method::Hqq) => groups * scale_type_bits,
            (Format::Int, false, _) => groups * bits,
            _ => 0,
        };
        let (kept_values, index_bits) = if recipe.keep_cols > 0 {
            let k = (recipe.keep_cols as u64).min(cols);
            (k * rows, k * INDEX_BITS)
        } else {
            let k = kept_count(recipe.keep_frac, elements);
            (k, k * INDEX_BITS)
        };
        let kept_bits = kept_values * KEPT_VALUE_BITS + index_bits;
        let column_factor_bits = if recipe.scales_columns() { cols * COLUMN_FACTOR_BITS } else { 0 };
        let total_bits = payload_bits + scale_bits + zero_point_bits + kept_bits + column_factor_bits;
        let source_bits = elements * u64::from(source_bits_per_element);
        let ratio = |bits: u64| if total_bits == 0 { 0.0 } else { bits as f64 / total_bits as f64 };
        BitCost {
            elements,
            groups,
            payload_bits,
            scale_bits,
            zero_point_bits,
            kept_values,
            kept_bits,
            column_factor_bits,
            total_bits,
            bytes: total_bits.div_ceil(8),
            bits_per_weight: if elements == 0 { 0.0 } else { total_bits as f64 / elements as f64 },
            source_bits,
            ratio_to_source: ratio(source_bits),
            ratio_to_16bit: ratio(elements * 16),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::recipe::ScaleDType;

    #[test]
    fn int4_g128_f16_costs_4_15625_bits() {
        // The worked example of the foundation issue: 4 + (16 + 4)/128.
        let c = BitCost::of(&Recipe::default(), 4096, 4096, 32);
        assert_eq!(c.bits_per_weight, 4.15625);
        assert_eq!(c.groups, 4096 * 32);
        assert_eq!(c.total_bits, c.payload_bits + c.scale_bits + c.zero_point_bits);
        assert_eq!(c.bytes, c.total_bits / 8);
        assert!((c.ratio_to_16bit - 16.0 / 4.15625).abs() < 1e-12);
        assert!((c.ratio_to_source - 32.0 / 4.15625).abs() < 1e-12);
    }

    #[test]
    fn short_last_groups_still_pay_a_whole_scale() {
        let r = Recipe { bits: 3, granularity: Granularity::Group(64), symmetric: true, scale_dtype: ScaleDType::F32, ..Recipe::default() };
        let c = BitCost::of(&r, 2, 100, 16);
        assert_eq!(c.groups, 4);
        assert_eq!(c.total_bits, 200 * 3 + 4 * 32);
        assert_eq!(c.bytes, (600 + 128u64).div_ceil(8));
    }

    #[test]
    fn per_tensor_and_per_row_counts() {
        let t = BitCost::of(&Recipe { granularity: Granularity::Tensor, ..Recipe::default() }, 10, 10, 16);
        assert_eq!(t.total_bits, 400 + 16 + 4);
        let r = BitCost::of(&Recipe { granularity: Granularity::Row, bits: 8, ..Recipe::default() }, 10, 10, 16);
        assert_eq!(r.total_bits, 800 + 10 * (16 + 8));
        let empty = BitCost::of(&Recipe::default(), 0, 10, 16);
        assert_eq!((empty.total_bits, empty.bits_per_weight, empty.ratio_to_source), (0, 0.0, 0.0));
        let empty_rows = BitCost::of(&Recipe { granularity: Granularity::Row, ..Recipe::default() }, 10, 0, 16);
        assert_eq!((empty_rows.groups, empty_rows.total_bits), (0, 0));
    }

    #[test]
    fn kept_values_hqq_zero_points_and_column_factors_are_counted() {
        let base = BitCost::of(&Recipe::default(), 64, 256, 16);
        let cols = BitCost::of(&Recipe { keep_cols: 3, ..Recipe::default() }, 64, 256, 16);
        assert_eq!(cols.total_bits - base.total_bits, 3 * 64 * 16 + 3 * 32);
        let frac = BitCost::of(&Recipe { keep_frac: 0.01, ..Recipe::default() }, 64, 256, 16);
        assert_eq!(frac.kept_values, 164); // round(0.01 × 16384)
        assert_eq!(frac.total_bits - base.total_bits, 164 * (16 + 32));
        let hqq = BitCost::of(&Recipe { method: Method::Hqq, ..Recipe::default() }, 64, 256, 16);
        assert_eq!(hqq.zero_point_bits, hqq.groups * 16);
        let awq = BitCost::of(&Recipe { method: Method::Awq, ..Recipe::default() }, 64, 256, 16);
        assert_eq!(awq.column_factor_bits, 256 * 32);
    }

    /// Source: QLoRA (Dettmers et al., NeurIPS 2023), section 3: NF4 with double quantization
    /// costs 4 + 8/64 + 32/(64·256) ≈ 4.127 bits per weight (plus our one f32 mean per tensor);
    /// OCP MX v1.0: MXFP4 costs 4 + 8/32 = 4.25.
    #[test]
    fn format_costs_match_the_published_figures() {
        let n = 4096.0 * 4096.0;
        let nf4 = Recipe { format: Format::Nf4, double_quant: true, symmetric: true, granularity: Granularity::Group(64), ..Recipe::default() };
        let c = BitCost::of(&nf4, 4096, 4096, 16);
        assert_eq!(c.bits_per_weight, 4.0 + 8.0 / 64.0 + 32.0 / (64.0 * 256.0) + 32.0 / n);
        assert!((c.bits_per_weight - 4.127).abs() < 0.0005);
        let mx = Recipe { format: Format::Mxfp4, symmetric: true, scale_dtype: ScaleDType::E8M0, granularity: Granularity::Group(32), ..Recipe::default() };
        assert_eq!(BitCost::of(&mx, 4096, 4096, 16).bits_per_weight, 4.25);
        let e4m3 = Recipe { format: Format::E4m3, symmetric: true, granularity: Granularity::Row, ..Recipe::default() };
        assert_eq!(BitCost::of(&e4m3, 4096, 4096, 16).bits_per_weight, 8.0 + 16.0 / 4096.0);
        let cb = Recipe { format: Format::Codebook, bits: 3, granularity: Granularity::Row, ..Recipe::default() };
        assert_eq!(BitCost::of(&cb, 4096, 4096, 16).bits_per_weight, 3.0 + 8.0 * 16.0 / 4096.0);
    }
}
