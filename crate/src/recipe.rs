//! A quantization choice as one plain value.
//!
//! The command line's flags, the page's controls and (later) the link fragment all map to and
//! from [`Recipe`]; its defaults live here and nowhere else.

use crate::error::{Error, Result};
use half::{bf16, f16};
use serde::{Deserialize, Serialize};
use std::fmt;
use std::str::FromStr;

/// Smallest and largest group size offered.
pub const GROUP_SIZES: std::ops::RangeInclusive<usize> = 8..=4096;
/// Smallest and largest integer bit width offered.
pub const BITS: std::ops::RangeInclusive<u8> = 2..=8;

/// Which elements share one scale (and zero point).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Granularity {
    /// One scale for the whole tensor.
    Tensor,
    /// One scale per row (per output channel).
    Row,
    /// One scale per run of this many consecutive elements of a row; the last run of a row may
    /// be shorter.
    Group(usize),
}

impl Granularity {
    /// Number of groups in one row of `cols` elements (for `Tensor`, the one group is counted on
    /// the first row only; see [`Granularity::group_count`]).
    pub fn groups_per_row(self, cols: usize) -> usize {
        match self {
            Granularity::Tensor | Granularity::Row => 1,
            Granularity::Group(g) => cols.div_ceil(g),
        }
    }

    /// Total number of groups in a [rows, cols] tensor.
    pub fn group_count(self, rows: usize, cols: usize) -> usize {
        match self {
            Granularity::Tensor => usize::from(rows * cols > 0),
            _ => rows * self.groups_per_row(cols),
        }
    }
}

impl fmt::Display for Granularity {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Granularity::Tensor => f.write_str("tensor"),
            Granularity::Row => f.write_str("row"),
            Granularity::Group(g) => write!(f, "{g}"),
        }
    }
}

impl FromStr for Granularity {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "tensor" => Ok(Granularity::Tensor),
            "row" | "channel" => Ok(Granularity::Row),
            other => other.parse::<usize>().map(Granularity::Group).map_err(|_| Error::BadRecipe {
                detail: format!("group '{s}' is not a size, 'row' or 'tensor'"),
            }),
        }
    }
}

/// The storage type of each group's scale.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ScaleDType {
    /// IEEE binary16.
    F16,
    /// bfloat16.
    BF16,
    /// IEEE binary32.
    F32,
}

impl ScaleDType {
    /// Bits one stored scale costs.
    pub fn bits(self) -> u32 {
        match self {
            ScaleDType::F16 | ScaleDType::BF16 => 16,
            ScaleDType::F32 => 32,
        }
    }

    /// Lower-case name.
    pub fn name(self) -> &'static str {
        match self {
            ScaleDType::F16 => "f16",
            ScaleDType::BF16 => "bf16",
            ScaleDType::F32 => "f32",
        }
    }

    /// Smallest positive normal value of the type.
    pub fn smallest_normal(self) -> f32 {
        match self {
            ScaleDType::F16 => f16::MIN_POSITIVE.to_f32(),
            ScaleDType::BF16 => bf16::MIN_POSITIVE.to_f32(),
            ScaleDType::F32 => f32::MIN_POSITIVE,
        }
    }

    /// Round a positive finite scale to this type (round to nearest, ties to even). A scale that
    /// rounds to zero becomes the type's smallest positive normal; one that overflows is `None`.
    pub fn round(self, scale: f32) -> Option<f32> {
        let stored = match self {
            ScaleDType::F16 => f16::from_f32(scale).to_f32(),
            ScaleDType::BF16 => bf16::from_f32(scale).to_f32(),
            ScaleDType::F32 => scale,
        };
        if !stored.is_finite() {
            None
        } else if stored == 0.0 && scale != 0.0 {
            Some(self.smallest_normal())
        } else {
            Some(stored)
        }
    }
}

impl FromStr for ScaleDType {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "f16" | "fp16" | "float16" => Ok(ScaleDType::F16),
            "bf16" | "bfloat16" => Ok(ScaleDType::BF16),
            "f32" | "fp32" | "float32" => Ok(ScaleDType::F32),
            _ => Err(Error::BadRecipe { detail: format!("scale type '{s}' is not one of f16, bf16, f32") }),
        }
    }
}

/// One quantization choice for a tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Recipe {
    /// Bits per quantized element.
    pub bits: u8,
    /// Which elements share a scale.
    pub granularity: Granularity,
    /// Symmetric grid around zero (no zero point) or asymmetric with a zero point.
    pub symmetric: bool,
    /// Storage type of the scales.
    pub scale_dtype: ScaleDType,
}

impl Default for Recipe {
    /// 4-bit asymmetric groups of 128 with f16 scales: the most common weight-only choice for
    /// large layers today (common practice).
    fn default() -> Self {
        Recipe { bits: 4, granularity: Granularity::Group(128), symmetric: false, scale_dtype: ScaleDType::F16 }
    }
}

impl Recipe {
    /// Check the recipe's ranges; every analysis calls this first.
    pub fn validate(&self) -> Result<()> {
        if !BITS.contains(&self.bits) {
            return Err(Error::BadRecipe {
                detail: format!("{} bits is outside {}..={}", self.bits, BITS.start(), BITS.end()),
            });
        }
        if let Granularity::Group(g) = self.granularity {
            if !GROUP_SIZES.contains(&g) {
                return Err(Error::BadRecipe {
                    detail: format!("group size {g} is outside {}..={}", GROUP_SIZES.start(), GROUP_SIZES.end()),
                });
            }
        }
        Ok(())
    }

    /// A short label such as "int4 asym g128 f16".
    pub fn label(&self) -> String {
        let grouping = match self.granularity {
            Granularity::Group(g) => format!("g{g}"),
            other => format!("per-{other}"),
        };
        let mode = if self.symmetric { "sym" } else { "asym" };
        format!("int{} {mode} {grouping} {}", self.bits, self.scale_dtype.name())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn validates_ranges() {
        assert!(Recipe::default().validate().is_ok());
        assert!(Recipe { bits: 1, ..Recipe::default() }.validate().is_err());
        assert!(Recipe { bits: 9, ..Recipe::default() }.validate().is_err());
        assert!(Recipe { granularity: Granularity::Group(4), ..Recipe::default() }.validate().is_err());
        assert!(Recipe { granularity: Granularity::Group(4097), ..Recipe::default() }.validate().is_err());
    }

    #[test]
    fn parses_and_prints_granularity() {
        for g in [Granularity::Tensor, Granularity::Row, Granularity::Group(64)] {
            assert_eq!(g.to_string().parse::<Granularity>().unwrap(), g);
        }
        assert!("sixty".parse::<Granularity>().is_err());
    }

    #[test]
    fn counts_groups_including_short_tails() {
        assert_eq!(Granularity::Group(128).group_count(3, 300), 9);
        assert_eq!(Granularity::Group(8).group_count(2, 8), 2);
        assert_eq!(Granularity::Row.group_count(5, 7), 5);
        assert_eq!(Granularity::Tensor.group_count(5, 7), 1);
        assert_eq!(Granularity::Group(8).group_count(5, 0), 0);
    }

    #[test]
    fn scale_rounding_handles_underflow_and_overflow() {
        // binary16's smallest positive normal is 2^-14 (IEEE 754-2008).
        assert_eq!(ScaleDType::F16.round(1e-9), Some(2f32.powi(-14)));
        assert_eq!(ScaleDType::F16.round(1e5), None);
        assert_eq!(ScaleDType::F16.round(65504.0), Some(65504.0));
        // A binary16 subnormal is stored as is: only a scale that rounds to zero is lifted.
        assert_eq!(ScaleDType::F16.round(2f32.powi(-20)), Some(2f32.powi(-20)));
        assert_eq!(ScaleDType::BF16.round(1.0 + 2f32.powi(-8)), Some(1.0));
        assert_eq!(ScaleDType::F32.round(0.3), Some(0.3));
    }

    #[test]
    fn recipes_round_trip_through_json() {
        let r = Recipe { bits: 3, granularity: Granularity::Group(32), symmetric: true, scale_dtype: ScaleDType::BF16 };
        let json = serde_json::to_string(&r).unwrap();
        assert_eq!(json, r#"{"bits":3,"granularity":{"group":32},"symmetric":true,"scale_dtype":"bf16"}"#);
        assert_eq!(serde_json::from_str::<Recipe>(&json).unwrap(), r);
        assert_eq!(serde_json::from_str::<Recipe>("{}").unwrap(), Recipe::default());
        assert!(serde_json::from_str::<Recipe>(r#"{"bitz":3}"#).is_err());
    }
}
