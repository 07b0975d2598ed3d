//! Element types and their conversion to `f32`.
//!
//! IEEE 754-2008 binary16 widens exactly (every binary16 value is a binary32 value; see
//! [`f16_to_f32`]), binary64 narrows with Rust's `as` (round to nearest even); bfloat16 is the top
//! 16 bits of a binary32, so widening it is exact (through the `half` crate). Integers convert to
//! the nearest `f32`.

use half::bf16;
use serde::Serialize;
use std::mem::MaybeUninit;

/// An element type the readers can decode.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum DType {
    /// IEEE binary16.
    F16,
    /// bfloat16 (top half of a binary32).
    BF16,
    /// IEEE binary32.
    F32,
    /// IEEE binary64.
    F64,
    /// Signed 8-bit integer.
    I8,
    /// Unsigned 8-bit integer.
    U8,
    /// Signed 16-bit integer.
    I16,
    /// Unsigned 16-bit integer.
    U16,
    /// Signed 32-bit integer.
    I32,
    /// Unsigned 32-bit integer.
    U32,
}

impl DType {
    /// The list shown when a type is refused.
    pub const SUPPORTED: &'static str = "f16, bf16, f32, f64, i8, u8, i16, u16, i32, u32";

    /// Bytes per element.
    pub fn size(self) -> usize {
        match self {
            DType::I8 | DType::U8 => 1,
            DType::F16 | DType::BF16 | DType::I16 | DType::U16 => 2,
            DType::F32 | DType::I32 | DType::U32 => 4,
            DType::F64 => 8,
        }
    }

    /// Bits per element, the baseline for size ratios.
    pub fn bits(self) -> u32 {
        8 * self.size() as u32
    }

    /// Lower-case name, as reports print it.
    pub fn name(self) -> &'static str {
        match self {
            DType::F16 => "f16",
            DType::BF16 => "bf16",
            DType::F32 => "f32",
            DType::F64 => "f64",
            DType::I8 => "i8",
            DType::U8 => "u8",
            DType::I16 => "i16",
            DType::U16 => "u16",
            DType::I32 => "i32",
            DType::U32 => "u32",
        }
    }
}

impl std::fmt::Display for DType {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

/// A stored element: its type and byte order.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Element {
    /// The element type.
    pub dtype: DType,
    /// Whether multi-byte elements are stored most significant byte first.
    pub big_endian: bool,
}

impl Element {
    /// A little-endian element, the byte order of safetensors and of most `.npy` files.
    pub fn little(dtype: DType) -> Self {
        Element { dtype, big_endian: false }
    }

    /// Decode `bytes` (exactly `out.len()` elements) into `out`, writing every element.
    pub fn decode(self, bytes: &[u8], out: &mut [MaybeUninit<f32>]) {
        let size = self.dtype.size();
        assert_eq!(bytes.len(), out.len() * size, "one element of bytes per output value");
        let chunks = bytes.chunks_exact(size);
        macro_rules! decode_with {
            ($n:literal, $convert:expr) => {
                for (dst, chunk) in out.iter_mut().zip(chunks) {
                    let raw: [u8; $n] = chunk.try_into().expect("chunk size");
                    dst.write($convert(raw, self.big_endian));
                }
            };
        }
        match self.dtype {
            DType::F16 => decode_with!(2, |r, be| f16_to_f32(u16_of(r, be))),
            DType::BF16 => decode_with!(2, |r, be| bf16::from_bits(u16_of(r, be)).to_f32()),
            DType::F32 => decode_with!(4, |r, be| f32::from_bits(u32_of(r, be))),
            DType::F64 => decode_with!(8, |r, be| f64::from_bits(u64_of(r, be)) as f32),
            DType::I8 => decode_with!(1, |r: [u8; 1], _| r[0] as i8 as f32),
            DType::U8 => decode_with!(1, |r: [u8; 1], _| r[0] as f32),
            DType::I16 => decode_with!(2, |r, be| u16_of(r, be) as i16 as f32),
            DType::U16 => decode_with!(2, |r, be| u16_of(r, be) as f32),
            DType::I32 => decode_with!(4, |r, be| u32_of(r, be) as i32 as f32),
            DType::U32 => decode_with!(4, |r, be| u32_of(r, be) as f32),
        }
    }
}

/// A binary16 value, given by its bits, as the binary32 value it equals (IEEE 754-2008, 3.6:
/// binary16 has 5 exponent bits of bias 15 and 10 fraction bits; binary32 8 of bias 127 and 23).
/// A NaN keeps its sign and payload and is made quiet, as the `half` crate does. Written as
/// selects rather than branches so that a decode loop vectorises: WebAssembly has no conversion
/// instruction, and `half`'s software path branches per value (natively, 16 M values in a loop
/// like `Element::decode`'s: 31 ms through `half`, 10 ms through this).
pub fn f16_to_f32(bits: u16) -> f32 {
    let bits = u32::from(bits);
    let sign = (bits & 0x8000) << 16;
    let magnitude = bits & 0x7fff;
    let fraction = bits & 0x03ff;
    // Normal: the exponent rebiased from 15 to 127, the fraction moved to the top of 23 bits.
    let normal = (magnitude << 13) + ((127 - 15) << 23);
    // Subnormal (and zero): fraction × 2^-24, exact in binary32.
    let subnormal = (fraction as f32 * f32::from_bits((127 - 24) << 23)).to_bits();
    // Infinity, or NaN with its payload and the quiet bit.
    let special = 0x7f80_0000 | (fraction << 13) | if fraction != 0 { 0x0040_0000 } else { 0 };
    let widened = if magnitude < 0x0400 {
        subnormal
    } else if magnitude >= 0x7c00 {
        special
    } else {
        normal
    };
    f32::from_bits(sign | widened)
}

fn u16_of(raw: [u8; 2], big_endian: bool) -> u16 {
    if big_endian { u16::from_be_bytes(raw) } else { u16::from_le_bytes(raw) }
}

fn u32_of(raw: [u8; 4], big_endian: bool) -> u32 {
    if big_endian { u32::from_be_bytes(raw) } else { u32::from_le_bytes(raw) }
}

fn u64_of(raw: [u8; 8], big_endian: bool) -> u64 {
    if big_endian { u64::from_be_bytes(raw) } else { u64::from_le_bytes(raw) }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn decodes_each_type_in_both_byte_orders() {
        let cases: [(DType, Vec<u8>, f32); 6] = [
            (DType::F16, 0x3C00u16.to_le_bytes().to_vec(), 1.0),
            (DType::BF16, 0xC040u16.to_le_bytes().to_vec(), -3.0),
            (DType::F32, 2.5f32.to_le_bytes().to_vec(), 2.5),
            (DType::F64, (-0.125f64).to_le_bytes().to_vec(), -0.125),
            (DType::I16, (-300i16).to_le_bytes().to_vec(), -300.0),
            (DType::I32, 70000i32.to_le_bytes().to_vec(), 70000.0),
        ];
        let decode = |element: Element, bytes: &[u8]| crate::tensor::read_values(bytes, 0, element, bytes.len() / element.dtype.size(), usize::MAX / 16).unwrap();
        for (dtype, le, want) in cases {
            assert_eq!(decode(Element::little(dtype), &le), [want], "{dtype} little-endian");
            let be: Vec<u8> = le.iter().rev().copied().collect();
            assert_eq!(decode(Element { dtype, big_endian: true }, &be), [want], "{dtype} big-endian");
        }
        assert_eq!(decode(Element::little(DType::I8), &[0xFF, 0x7F]), [-1.0, 127.0]);
        assert_eq!(decode(Element::little(DType::U8), &[0xFF, 0x7F]), [255.0, 127.0]);
    }

    /// Every one of the 65536 binary16 bit patterns widens to the binary32 the `half` crate gives
    /// (a general-purpose library from the registry, used here as the reference), bit for bit:
    /// zeros, subnormals, normals, infinities and NaNs of both signs.
    #[test]
    fn binary16_widens_as_the_reference_library_does() {
        for bits in 0..=u16::MAX {
            let want = half::f16::from_bits(bits).to_f32();
            assert_eq!(f16_to_f32(bits).to_bits(), want.to_bits(), "binary16 {bits:#06x}");
        }
        // IEEE 754-2008 values (common practice): the smallest subnormal 2^-24, the largest
        // finite 65504, one.
        assert_eq!((f16_to_f32(0x0001), f16_to_f32(0x7bff), f16_to_f32(0x3c00)), (2f32.powi(-24), 65504.0, 1.0));
    }
}
