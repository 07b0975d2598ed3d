//! Element types and their conversion to `f32`.
//!
//! IEEE 754-2008 binary16 and binary64 convert through the `half` crate and Rust's `as`
//! (round to nearest even); bfloat16 is the top 16 bits of a binary32, so widening it is exact.
//! Integers convert to the nearest `f32`.

use half::{bf16, f16};
use serde::Serialize;

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

    /// Decode `bytes` (exactly `out.len()` elements) into `out`.
    pub fn decode(self, bytes: &[u8], out: &mut [f32]) {
        let size = self.dtype.size();
        debug_assert_eq!(bytes.len(), out.len() * size);
        let chunks = bytes.chunks_exact(size);
        macro_rules! decode_with {
            ($n:literal, $convert:expr) => {
                for (dst, chunk) in out.iter_mut().zip(chunks) {
                    let raw: [u8; $n] = chunk.try_into().expect("chunk size");
                    *dst = $convert(raw, self.big_endian);
                }
            };
        }
        match self.dtype {
            DType::F16 => decode_with!(2, |r, be| f16::from_bits(u16_of(r, be)).to_f32()),
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
        for (dtype, le, want) in cases {
            let mut out = [0f32];
            Element::little(dtype).decode(&le, &mut out);
            assert_eq!(out[0], want, "{dtype} little-endian");
            let be: Vec<u8> = le.iter().rev().copied().collect();
            Element { dtype, big_endian: true }.decode(&be, &mut out);
            assert_eq!(out[0], want, "{dtype} big-endian");
        }
        let mut out = [0f32; 2];
        Element::little(DType::I8).decode(&[0xFF, 0x7F], &mut out);
        assert_eq!(out, [-1.0, 127.0]);
        Element::little(DType::U8).decode(&[0xFF, 0x7F], &mut out);
        assert_eq!(out, [255.0, 127.0]);
    }
}
