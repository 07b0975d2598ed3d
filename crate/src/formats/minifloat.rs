//! Small floating-point element types as the OCP specifications define them: the 8-bit
//! floating point specification (OFP8: E4M3 and E5M2) and the Microscaling Formats (MX)
//! specification v1.0 (E2M1, E2M3, E3M2).
//!
//! A value with e exponent bits, m mantissa bits and bias b is (−1)^s·2^(E−b)·(1 + M/2^m) for
//! E ≥ 1 and (−1)^s·2^(1−b)·(M/2^m) for E = 0 (subnormals). Maxima: E4M3 448 (the top code
//! S.1111.111 is NaN), E5M2 57344 (the top exponent holds ±∞ and NaN), E2M1 6, E2M3 7.5,
//! E3M2 28 (no infinity or NaN in the last three). Rounding is to nearest, ties to even.
//! Overflow saturates to ±max — the OCP specifications' saturating conversion mode — so no
//! infinity or NaN is ever produced from a finite input.

use crate::simd::F32x4;
use serde::Serialize;

/// One small-float element type.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MiniFloat {
    /// Name as the specifications write it.
    pub name: &'static str,
    /// Mantissa bits.
    pub mantissa_bits: i32,
    /// Exponent of the smallest normal, 1 − bias.
    pub min_exponent: i32,
    /// Exponent of the largest normal (emax in the MX specification).
    pub max_exponent: i32,
    /// Largest finite magnitude.
    pub max: f32,
    /// Bits per element.
    pub bits: u32,
}

/// E2M1 (4-bit), bias 1.
pub const E2M1: MiniFloat = MiniFloat { name: "E2M1", mantissa_bits: 1, min_exponent: 0, max_exponent: 2, max: 6.0, bits: 4 };
/// E2M3 (6-bit), bias 1.
pub const E2M3: MiniFloat = MiniFloat { name: "E2M3", mantissa_bits: 3, min_exponent: 0, max_exponent: 2, max: 7.5, bits: 6 };
/// E3M2 (6-bit), bias 3.
pub const E3M2: MiniFloat = MiniFloat { name: "E3M2", mantissa_bits: 2, min_exponent: -2, max_exponent: 4, max: 28.0, bits: 6 };
/// E4M3 (8-bit), bias 7.
pub const E4M3: MiniFloat = MiniFloat { name: "E4M3", mantissa_bits: 3, min_exponent: -6, max_exponent: 8, max: 448.0, bits: 8 };
/// E5M2 (8-bit), bias 15.
pub const E5M2: MiniFloat = MiniFloat { name: "E5M2", mantissa_bits: 2, min_exponent: -14, max_exponent: 15, max: 57344.0, bits: 8 };

impl MiniFloat {
    /// Round `x` to the nearest representable value (ties to even), saturating at ±max.
    pub fn round(&self, x: f32) -> f32 {
        if x == 0.0 || !x.is_finite() {
            return if x.is_nan() { 0.0 } else if x == 0.0 { x } else { self.max.copysign(x) };
        }
        let a = f64::from(x.abs());
        let exponent = (a.log2().floor() as i32).max(self.min_exponent);
        // The spacing of representable values in this binade (the subnormals share the
        // smallest normal binade's spacing).
        let quantum = 2f64.powi(exponent - self.mantissa_bits);
        let rounded = (a / quantum).round_ties_even() * quantum;
        (rounded.min(f64::from(self.max)) as f32).copysign(x)
    }

    /// [`MiniFloat::round`] on four lanes, with f32 bit arithmetic instead of a logarithm: the
    /// binade's spacing 2^(E − m) comes from the exponent field (E at least the smallest normal
    /// exponent), the rounding from the magic-number trick (exact while |x|/spacing < 2²², which
    /// holds since it is below 2^(m+1)). Division and multiplication by the spacing, a power of
    /// two, are exact. Tested equal to `round` on every representable value, every tie and
    /// random inputs.
    #[inline(always)]
    pub fn round_lanes(&self, x: F32x4) -> F32x4 {
        const MAGIC: f32 = 12_582_912.0; // 1.5 · 2^23
        let (magic, smallest_binade) = (F32x4::splat(MAGIC), F32x4::splat(2f32.powi(self.min_exponent)));
        let a = x.abs();
        let spacing = a.binade().max(smallest_binade) * F32x4::splat(2f32.powi(-self.mantissa_bits));
        let rounded = ((a / spacing + magic) - magic) * spacing;
        rounded.min(F32x4::splat(self.max)).with_sign_of(x)
    }

    /// Every non-negative representable value, ascending.
    pub fn positive_values(&self) -> Vec<f32> {
        let mut values = vec![0.0];
        let steps = 1 << self.mantissa_bits;
        for m in 1..steps {
            values.push((f64::from(m) * 2f64.powi(self.min_exponent - self.mantissa_bits)) as f32);
        }
        for e in self.min_exponent..=self.max_exponent {
            for m in 0..steps {
                let v = (2f64.powi(e) * (1.0 + f64::from(m) / f64::from(steps))) as f32;
                if v <= self.max {
                    values.push(v);
                }
            }
        }
        values
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn maxima_and_subnormals_follow_the_specifications() {
        for (f, max, smallest) in [(E2M1, 6.0, 0.5), (E2M3, 7.5, 0.125), (E3M2, 28.0, 0.0625), (E4M3, 448.0, 2f32.powi(-9)), (E5M2, 57344.0, 2f32.powi(-16))] {
            let values = f.positive_values();
            assert_eq!(*values.last().unwrap(), max, "{}", f.name);
            assert_eq!(values[1], smallest, "{}", f.name);
            assert!(values.windows(2).all(|w| w[0] < w[1]));
            assert_eq!(f.round(max * 10.0), max, "{} saturates", f.name);
            assert_eq!(f.round(-max * 10.0), -max);
        }
        // E2M1 holds 0, 0.5, 1, 1.5, 2, 3, 4, 6: eight magnitudes for a 4-bit sign-magnitude code.
        assert_eq!(E2M1.positive_values(), vec![0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0]);
        assert_eq!(E4M3.positive_values().len(), 127, "the 128th code is NaN");
    }

    #[test]
    fn ties_round_to_even() {
        assert_eq!(E2M1.round(2.5), 2.0);
        assert_eq!(E2M1.round(3.5), 4.0);
        assert_eq!(E2M1.round(0.25), 0.0);
        assert_eq!(E2M1.round(0.75), 1.0);
        assert_eq!(E2M1.round(-5.0), -4.0);
        assert!(E4M3.round(-0.0).is_sign_negative());
    }

    #[test]
    fn the_fast_rounding_equals_the_reference() {
        let mut rng = crate::demo::Rng::new(5);
        for f in [E2M1, E2M3, E3M2, E4M3, E5M2] {
            let values = f.positive_values();
            let mut probes: Vec<f32> = values.iter().flat_map(|&v| [v, -v]).collect();
            probes.extend(values.windows(2).map(|w| (w[0] + w[1]) / 2.0));
            probes.extend((0..20_000).map(|_| (rng.normal() * f64::from(f.max) / 2.0) as f32));
            probes.extend([f.max * 3.0, 1e-30, -0.0, 0.0, f32::MAX]);
            for x in probes {
                let lanes = f.round_lanes(F32x4::splat(x)).to_array();
                assert_eq!(lanes.map(f32::to_bits), [f.round(x).to_bits(); 4], "{} of {x:e}", f.name);
            }
        }
    }
}
