//! The bit budget of a quantized tensor, counted exactly.
//!
//! total = n·b (payload) + G·s (one scale of s bits per group) + G·b (one b-bit zero point per
//! group, asymmetric grids only), with G groups; a group shorter than the group size still stores
//! a whole scale. Example: 4-bit asymmetric, groups of 128, f16 scales costs
//! 4 + (16 + 4)/128 = 4.15625 bits per weight when every row is a multiple of 128 long.

use crate::recipe::Recipe;
use serde::Serialize;

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
        let elements = (rows as u64) * (cols as u64);
        let groups = recipe.granularity.group_count(rows, cols) as u64;
        let bits = u64::from(recipe.bits);
        let payload_bits = elements * bits;
        let scale_bits = groups * u64::from(recipe.scale_dtype.bits());
        let zero_point_bits = if recipe.symmetric { 0 } else { groups * bits };
        let total_bits = payload_bits + scale_bits + zero_point_bits;
        let source_bits = elements * u64::from(source_bits_per_element);
        let ratio = |bits: u64| if total_bits == 0 { 0.0 } else { bits as f64 / total_bits as f64 };
        BitCost {
            elements,
            groups,
            payload_bits,
            scale_bits,
            zero_point_bits,
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
    use crate::recipe::{Granularity, ScaleDType};

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
        let r = Recipe { bits: 3, granularity: Granularity::Group(64), symmetric: true, scale_dtype: ScaleDType::F32 };
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
    }
}
