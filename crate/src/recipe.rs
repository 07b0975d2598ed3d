//! A quantization choice as one plain value.
//!
//! The command line's flags, the page's controls and (later) the link fragment all map to and
//! from [`Recipe`]; its defaults live here and nowhere else.

use crate::error::{Error, Result};
pub use crate::formats::Format;
use half::{bf16, f16};
use serde::{Deserialize, Serialize};
use std::fmt;
use std::str::FromStr;

/// Smallest and largest group size offered.
pub const GROUP_SIZES: std::ops::RangeInclusive<usize> = 8..=4096;
/// Largest fraction of weights that may be kept in 16-bit.
pub const MAX_KEEP_FRACTION: f32 = 0.1;
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
    /// 8-bit power of two (the OCP MX shared scale).
    E8M0,
}

impl ScaleDType {
    /// Bits one stored scale costs.
    pub fn bits(self) -> u32 {
        match self {
            ScaleDType::F16 | ScaleDType::BF16 => 16,
            ScaleDType::F32 => 32,
            ScaleDType::E8M0 => 8,
        }
    }

    /// Lower-case name.
    pub fn name(self) -> &'static str {
        match self {
            ScaleDType::F16 => "f16",
            ScaleDType::BF16 => "bf16",
            ScaleDType::F32 => "f32",
            ScaleDType::E8M0 => "e8m0",
        }
    }

    /// Smallest positive normal value of the type.
    pub fn smallest_normal(self) -> f32 {
        match self {
            ScaleDType::F16 => f16::MIN_POSITIVE.to_f32(),
            ScaleDType::BF16 => bf16::MIN_POSITIVE.to_f32(),
            ScaleDType::F32 => f32::MIN_POSITIVE,
            ScaleDType::E8M0 => 2f32.powi(-127),
        }
    }

    /// A group's scale in this type: [`ScaleDType::round`], except that E8M0's power of two is
    /// rounded up. To the nearest power of two the grid could shrink by up to √2 and clip the
    /// group's largest values (by up to 29 %); rounded up it still covers the group's range,
    /// as fixed-point formats give the largest value enough integer bits (common practice).
    pub fn round_scale(self, scale: f32) -> Option<f32> {
        match self {
            ScaleDType::E8M0 => Some(2f64.powi((f64::from(scale).log2().ceil() as i32).clamp(-127, 127)) as f32),
            _ => self.round(scale),
        }
    }

    /// Round a positive finite scale to this type (round to nearest, ties to even). A scale that
    /// rounds to zero becomes the type's smallest positive normal; one that overflows is `None`.
    pub fn round(self, scale: f32) -> Option<f32> {
        let stored = match self {
            ScaleDType::F16 => f16::from_f32(scale).to_f32(),
            ScaleDType::BF16 => bf16::from_f32(scale).to_f32(),
            ScaleDType::F32 => scale,
            // The nearest power of two in the log domain, within E8M0's 2⁻¹²⁷…2¹²⁷.
            ScaleDType::E8M0 => 2f64.powi((f64::from(scale).log2().round() as i32).clamp(-127, 127)) as f32,
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
            "e8m0" => Ok(ScaleDType::E8M0),
            _ => Err(Error::BadRecipe { detail: format!("scale type '{s}' is not one of f16, bf16, f32, e8m0") }),
        }
    }
}

/// What chooses the codes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    /// Round to nearest on the min/max grid.
    Rtn,
    /// Shrink each group's range over a grid of ratios and keep the best (common practice).
    Clip,
    /// Half-quadratic zero points (HQQ, Badri & Shaji 2023); no calibration needed.
    Hqq,
    /// Error-compensating rounding (GPTQ, Frantar et al., ICLR 2023); needs an activation sample.
    Gptq,
    /// Activation-aware scaling (AWQ, Lin et al., MLSys 2024); needs calibration.
    Awq,
}

impl Method {
    /// Lower-case name.
    pub fn name(self) -> &'static str {
        match self {
            Method::Rtn => "rtn",
            Method::Clip => "clip",
            Method::Hqq => "hqq",
            Method::Gptq => "gptq",
            Method::Awq => "awq",
        }
    }
}

impl FromStr for Method {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "rtn" => Ok(Method::Rtn),
            "clip" => Ok(Method::Clip),
            "hqq" => Ok(Method::Hqq),
            "gptq" => Ok(Method::Gptq),
            "awq" => Ok(Method::Awq),
            _ => Err(Error::BadRecipe { detail: format!("method '{s}' is not one of rtn, clip, hqq, gptq, awq") }),
        }
    }
}

/// One quantization choice for a tensor.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Recipe {
    /// Number format of the elements.
    pub format: Format,
    /// NF4: quantize the block scales again to 8 bits in blocks of 256 (QLoRA's double
    /// quantization).
    pub double_quant: bool,
    /// Bits per quantized element (integer grids and codebooks; the other formats fix it).
    pub bits: u8,
    /// Which elements share a scale.
    pub granularity: Granularity,
    /// Symmetric grid around zero (no zero point) or asymmetric with a zero point.
    pub symmetric: bool,
    /// Storage type of the scales.
    pub scale_dtype: ScaleDType,
    /// What chooses the codes.
    pub method: Method,
    /// GPTQ: dampening added to diag(H), as a fraction of its mean.
    pub damp: f32,
    /// GPTQ: process columns in order of decreasing diag(H).
    pub act_order: bool,
    /// AWQ: also search a clipping ratio per group.
    pub awq_clip: bool,
    /// Smoothing strength α: fold SmoothQuant's per-column factors into the weight first.
    pub smooth: Option<f32>,
    /// Input columns kept in 16-bit (the most important ones).
    pub keep_cols: usize,
    /// Fraction of individual weights kept in 16-bit (the largest |w|).
    pub keep_frac: f32,
}

impl Default for Recipe {
    /// 4-bit asymmetric groups of 128 with f16 scales, round to nearest: the most common
    /// weight-only choice for large layers today (common practice). GPTQ's 1 % dampening is
    /// the GPTQ paper's default.
    fn default() -> Self {
        Recipe {
            format: Format::Int,
            double_quant: false,
            bits: 4,
            granularity: Granularity::Group(128),
            symmetric: false,
            scale_dtype: ScaleDType::F16,
            method: Method::Rtn,
            damp: 0.01,
            act_order: false,
            awq_clip: false,
            smooth: None,
            keep_cols: 0,
            keep_frac: 0.0,
        }
    }
}

impl Recipe {
    /// A recipe from its JSON (the page's links and requests): missing fields
    /// take their defaults, unknown ones are refused. The ranges are not checked here; see
    /// [`Recipe::validate`].
    pub fn from_json(text: &str) -> Result<Self> {
        // serde would also read a struct from a JSON array, field by field in order, and then
        // explain a bad element by its position alone.
        if !text.trim_start().starts_with('{') {
            return Err(Error::BadRecipe { detail: r#"a recipe is a JSON object of named fields, such as {"bits": 3}"#.into() });
        }
        serde_json::from_str(text).map_err(|e| Error::BadRecipe { detail: e.to_string() })
    }

    /// The default recipe for a format: blocks of 64 for NF4 (the QLoRA paper's choice), of 32
    /// for the MX formats (their specification) with E8M0 scales, symmetric groups of 32 for the
    /// small floats, and a 4-bit codebook per row.
    pub fn for_format(format: Format) -> Self {
        let base = Recipe { format, ..Recipe::default() };
        match format {
            Format::Int => base,
            Format::Nf4 => Recipe { symmetric: true, granularity: Granularity::Group(64), ..base },
            Format::Codebook => Recipe { granularity: Granularity::Row, ..base },
            f if f.is_mx() => Recipe { symmetric: true, granularity: Granularity::Group(crate::formats::MX_BLOCK), scale_dtype: ScaleDType::E8M0, ..base },
            _ => Recipe { symmetric: true, granularity: Granularity::Group(32), ..base },
        }
    }

    /// Check the recipe's ranges; every analysis calls this first.
    pub fn validate(&self) -> Result<()> {
        if self.double_quant && (self.format != Format::Nf4 || self.method != Method::Rtn) {
            return Err(Error::BadRecipe { detail: "double quantization applies to NF4's block scales under round to nearest".into() });
        }
        if self.format != Format::Int {
            return self.validate_format();
        }
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
        let bad = |detail: String| Err(Error::BadRecipe { detail });
        if !(0.0..=1.0).contains(&self.damp) {
            return bad(format!("dampening {} is outside 0..=1", self.damp));
        }
        if let Some(alpha) = self.smooth {
            if !(0.0..=1.0).contains(&alpha) {
                return bad(format!("smoothing strength {alpha} is outside 0..=1"));
            }
        }
        if !(0.0..=MAX_KEEP_FRACTION).contains(&self.keep_frac) {
            return bad(format!(
                "kept fraction {} ({} %) is outside 0 to {MAX_KEEP_FRACTION} ({} %)",
                self.keep_frac,
                self.keep_frac * 100.0,
                MAX_KEEP_FRACTION * 100.0
            ));
        }
        if self.keep_cols > 0 && self.keep_frac > 0.0 {
            return bad("keep either whole columns or a fraction of weights, not both".into());
        }
        if self.method == Method::Awq && self.smooth.is_some() {
            return bad("AWQ chooses its own column factors; use it without smoothing".into());
        }
        if self.method == Method::Hqq && self.symmetric {
            return bad("HQQ fits the zero point, so it needs an asymmetric grid".into());
        }
        if self.method == Method::Hqq && self.scale_dtype == ScaleDType::E8M0 {
            return bad("HQQ stores its real zero points in the scale's type, and E8M0 holds only powers of two; choose f16, bf16 or f32".into());
        }
        Ok(())
    }

    /// The checks of a non-integer format, then the shared ones.
    fn validate_format(&self) -> Result<()> {
        self.format.validate(self)?;
        let bad = |detail: String| Err(Error::BadRecipe { detail });
        if let Granularity::Group(g) = self.granularity {
            if !GROUP_SIZES.contains(&g) {
                return bad(format!("group size {g} is outside {}..={}", GROUP_SIZES.start(), GROUP_SIZES.end()));
            }
        }
        match self.method {
            Method::Hqq => return bad("HQQ fits a zero point, which only the integer grid has".into()),
            Method::Gptq | Method::Awq | Method::Clip if self.format == Format::Codebook => {
                return bad(format!("{} works on scaled formats, not on a fitted codebook", self.method.name()))
            }
            _ => {}
        }
        Recipe { format: Format::Int, bits: 4, double_quant: false, method: Method::Rtn, ..*self }.validate()
    }

    /// Whether per-column factors are folded into the weight (smoothing or AWQ).
    pub fn scales_columns(&self) -> bool {
        self.smooth.is_some() || self.method == Method::Awq
    }

    /// A short label such as "int4 asym g128 f16" or "int4 asym g128 f16 gptq keep 1%".
    pub fn label(&self) -> String {
        let grouping = match self.granularity {
            Granularity::Group(g) => format!("g{g}"),
            other => format!("per-{other}"),
        };
        let mode = if self.symmetric { "sym" } else { "asym" };
        let mut label = match self.format {
            Format::Int => format!("int{} {mode} {grouping} {}", self.bits, self.scale_dtype.name()),
            Format::Codebook => format!("codebook{} {grouping}", self.bits),
            f if f.is_mx() => f.name().to_string(),
            f => format!("{} {grouping} {}{}", f.name(), self.scale_dtype.name(), if self.double_quant { " dq" } else { "" }),
        };
        if self.method != Method::Rtn {
            label.push(' ');
            label.push_str(self.method.name());
        }
        if let Some(alpha) = self.smooth {
            label.push_str(&format!(" smooth {alpha}"));
        }
        if self.keep_cols > 0 {
            label.push_str(&format!(" keep {} col{}", self.keep_cols, if self.keep_cols == 1 { "" } else { "s" }));
        }
        if self.keep_frac > 0.0 {
            label.push_str(&format!(" keep {}%", self.keep_frac * 100.0));
        }
        label
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
        assert!(Recipe { method: Method::Hqq, symmetric: true, ..Recipe::default() }.validate().is_err());
        assert!(Recipe { method: Method::Hqq, scale_dtype: ScaleDType::E8M0, ..Recipe::default() }.validate().is_err());
        assert!(Recipe { keep_cols: 2, keep_frac: 0.01, ..Recipe::default() }.validate().is_err());
        // The page shows the fraction in percent and the command takes it as a fraction: the
        // message gives both.
        let too_many = Recipe { keep_frac: 0.2, ..Recipe::default() }.validate().unwrap_err().to_string();
        assert!(too_many.contains("kept fraction 0.2 (20 %) is outside 0 to 0.1 (10 %)"), "{too_many}");
        assert!(Recipe { smooth: Some(1.5), ..Recipe::default() }.validate().is_err());
        assert!(Recipe { method: Method::Awq, smooth: Some(0.5), ..Recipe::default() }.validate().is_err());
        assert!(Recipe { damp: -0.1, ..Recipe::default() }.validate().is_err());
        // Double quantization is NF4's: on the integer grid it used to pass and wreck the scales.
        assert!(Recipe { double_quant: true, ..Recipe::default() }.validate().is_err());
        assert!(Recipe { double_quant: true, ..Recipe::for_format(Format::Nf4) }.validate().is_ok());
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
        // A scale's power of two is rounded up, so the grid covers the range it was fitted to;
        // a stored zero point's goes to the nearest. 2^0.4 ≈ 1.32, 0.3 ≈ 2^−1.74.
        let scale = 2f32.powf(0.4);
        assert_eq!((ScaleDType::E8M0.round_scale(scale), ScaleDType::E8M0.round(scale)), (Some(2.0), Some(1.0)));
        assert_eq!((ScaleDType::E8M0.round_scale(0.3), ScaleDType::E8M0.round(0.3)), (Some(0.5), Some(0.25)));
        assert_eq!(ScaleDType::E8M0.round_scale(0.25), Some(0.25));
        assert_eq!(ScaleDType::F16.round_scale(0.3), ScaleDType::F16.round(0.3));
    }

    #[test]
    fn recipes_round_trip_through_json() {
        let r = Recipe { bits: 3, granularity: Granularity::Group(32), symmetric: true, scale_dtype: ScaleDType::BF16, ..Recipe::default() };
        let json = serde_json::to_string(&r).unwrap();
        assert!(json.starts_with(r#"{"format":"int","double_quant":false,"bits":3,"granularity":{"group":32},"symmetric":true,"scale_dtype":"bf16","method":"rtn""#), "{json}");
        assert_eq!(Recipe::from_json(&json).unwrap(), r);
        assert_eq!(Recipe::from_json(" {}").unwrap(), Recipe::default());
    }

    #[test]
    fn a_recipe_from_json_is_an_object_of_known_fields() {
        let message = |text: &str| Recipe::from_json(text).unwrap_err().to_string();
        assert!(message(r#"{"bitz":3}"#).starts_with("invalid recipe: unknown field `bitz`"), "{}", message(r#"{"bitz":3}"#));
        assert!(message(r#"{"damp":"x"}"#).contains(r#"invalid type: string "x", expected f32"#));
        // An array would be read field by field in order.
        for text in ["[3]", "3", "", "null"] {
            assert!(message(text).ends_with(r#"a recipe is a JSON object of named fields, such as {"bits": 3}"#), "{text}");
        }
        // The ranges are for `validate`.
        assert_eq!(Recipe::from_json(r#"{"bits":99}"#).unwrap().bits, 99);
    }
}
