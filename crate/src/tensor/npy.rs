//! NumPy `.npy` files, format versions 1.0, 2.0 and 3.0.
//!
//! Layout, from the NumPy Enhancement Proposal NEP 1 and `numpy.lib.format`: the magic
//! `\x93NUMPY`, a major and minor version byte, the header length (u16 little-endian in 1.0,
//! u32 in 2.0 and 3.0), then a Python dict literal with `descr`, `fortran_order` and `shape`,
//! padded with spaces and ended by a newline so that the data starts on a 64-byte boundary.
//! Version 3.0 differs from 2.0 only in allowing UTF-8 in the header.

use super::{element_count, read_range, ByteSource, DType, Element, ReadOptions, TensorEntry};
use crate::error::{Error, Result};

/// The six bytes every `.npy` file starts with.
pub const MAGIC: &[u8] = b"\x93NUMPY";

/// Headers larger than this are refused before they are read. A plain array's header is under
/// 200 bytes (NumPy pads it to 64 or so), and NumPy's own reader refuses more than 10 000 by
/// default (`numpy.lib.format`'s `max_header_size`, from memory); 1 MiB leaves room for odd
/// writers while a version 2.0 length field, which can claim 4 GiB, cannot make us allocate it.
pub const MAX_HEADER_BYTES: u64 = 1 << 20;

/// Deepest nesting of brackets the header parser follows. A real header nests two levels (the
/// dict and its shape tuple); the parser recurses per level, so a header of a million '[' would
/// otherwise exhaust the stack (wasm's is 1 MiB) and abort instead of failing.
const MAX_HEADER_DEPTH: usize = 8;

const FORMAT: &str = "NumPy .npy";

fn bad(detail: impl Into<String>) -> Error {
    Error::BadFormat { format: FORMAT, detail: detail.into() }
}

/// Parse the header of a `.npy` source into the entry of its single array.
pub fn read_header<S: ByteSource + ?Sized>(src: &S, opts: ReadOptions) -> Result<TensorEntry> {
    let preamble = read_range(src, 0, 8, "header")?;
    if &preamble[..6] != MAGIC {
        return Err(bad("missing the \\x93NUMPY magic"));
    }
    let major = preamble[6];
    let (len_bytes, start) = match major {
        1 => (2u64, 10u64),
        2 | 3 => (4, 12),
        _ => return Err(bad(format!("format version {major}.{} is unknown (1.0, 2.0 and 3.0 are read)", preamble[7]))),
    };
    let len_field = read_range(src, 8, len_bytes, "header length")?;
    let header_len = match *len_field.as_slice() {
        [a, b] => u64::from(u16::from_le_bytes([a, b])),
        [a, b, c, d] => u64::from(u32::from_le_bytes([a, b, c, d])),
        _ => unreachable!("two or four bytes were read"),
    };
    if header_len > MAX_HEADER_BYTES {
        return Err(bad(format!("the header claims {header_len} bytes, more than the {MAX_HEADER_BYTES} allowed")));
    }
    let header = read_range(src, start, header_len, "header")?;
    let text = std::str::from_utf8(&header).map_err(|_| bad("the header is not text"))?;
    let fields = HeaderFields::parse(text)?;
    let element = fields.element(opts)?;
    let count = element_count(&fields.shape)?;
    let itemsize = fields.itemsize as u64;
    let bytes = (count as u64).checked_mul(itemsize).ok_or_else(|| Error::BadShape {
        shape: fields.shape.clone(),
        detail: "the byte size overflows".into(),
    })?;
    let offset = start + header_len;
    let available = src.len();
    if offset.checked_add(bytes).is_none_or(|end| end > available) {
        return Err(Error::Truncated { what: "array data", needed: offset.saturating_add(bytes), available });
    }
    Ok(TensorEntry {
        name: String::new(),
        dtype_label: fields.descr.clone(),
        element,
        shape: fields.shape,
        offset,
        bytes,
        fortran_order: fields.fortran_order,
    })
}

/// The three keys of a `.npy` header.
struct HeaderFields {
    descr: String,
    itemsize: usize,
    fortran_order: bool,
    shape: Vec<usize>,
}

impl HeaderFields {
    fn parse(text: &str) -> Result<Self> {
        let mut parser = Literal { text, pos: 0, depth: 0 };
        let dict = parser.value()?;
        let Value::Dict(items) = dict else { return Err(bad("the header is not a dict")) };
        // NumPy would take the last of two values silently; a writer that gave two meant neither.
        let mut seen = std::collections::HashSet::new();
        if let Some((key, _)) = items.iter().find(|(k, _)| !seen.insert(k.as_str())) {
            return Err(bad(format!("the header gives '{key}' twice")));
        }
        let get = |key: &str| items.iter().find(|(k, _)| k == key).map(|(_, v)| v);
        let descr = match get("descr") {
            Some(Value::Str(s)) => s.clone(),
            Some(Value::List(_)) => {
                return Err(Error::UnsupportedDtype {
                    dtype: "structured".into(),
                    hint: "structured (record) arrays have no single number type; save one field as its own array".into(),
                })
            }
            _ => return Err(bad("the header has no 'descr' string")),
        };
        let fortran_order = match get("fortran_order") {
            Some(Value::Bool(b)) => *b,
            _ => return Err(bad("the header has no 'fortran_order' flag")),
        };
        let shape = match get("shape") {
            Some(Value::List(dims)) => dims
                .iter()
                .map(|d| match d {
                    Value::Int(n) => usize::try_from(*n).map_err(|_| bad(format!("shape dimension {n} is not valid"))),
                    _ => Err(bad("the shape holds something other than integers")),
                })
                .collect::<Result<Vec<_>>>()?,
            _ => return Err(bad("the header has no 'shape' tuple")),
        };
        let itemsize = descr
            .get(2..)
            .and_then(|s| s.parse::<usize>().ok())
            .filter(|&n| (1..=64).contains(&n))
            .unwrap_or(1);
        Ok(HeaderFields { descr, itemsize, fortran_order, shape })
    }

    fn element(&self, opts: ReadOptions) -> Result<Option<Element>> {
        let unsupported = |hint: &str| Error::UnsupportedDtype { dtype: self.descr.clone(), hint: hint.into() };
        let mut chars = self.descr.chars();
        let order = chars.next().ok_or_else(|| bad("empty 'descr'"))?;
        let big_endian = match order {
            '<' | '|' | '=' => false,
            '>' => true,
            _ => return Err(unsupported("the byte order mark is missing")),
        };
        let code = chars.as_str();
        let dtype = match code {
            "f2" => DType::F16,
            "f4" => DType::F32,
            "f8" => DType::F64,
            "i1" => DType::I8,
            "u1" => DType::U8,
            "i2" => DType::I16,
            "i4" => DType::I32,
            "u4" => DType::U32,
            "u2" | "V2" if opts.raw16_as_bf16 => DType::BF16,
            "u2" => DType::U16,
            "V2" => return Err(unsupported("raw 2-byte values: if they are bfloat16, ask to read them as bf16 (--bf16)")),
            c if c.starts_with('O') => return Err(unsupported("object arrays hold Python objects, not numbers")),
            c if c.starts_with('U') || c.starts_with('S') => return Err(unsupported("text arrays hold no numbers")),
            c if c.starts_with('c') => return Err(unsupported("complex numbers cannot be quantized as real weights")),
            // NumPy's codes count bytes: i8 is int64, not int8.
            "i8" | "u8" => return Err(unsupported("64-bit integers (int64, uint64) are not read; convert the array to float32 first")),
            _ => return Err(unsupported("the NumPy types read are f2, f4, f8 (float16, float32, float64) and i1, u1, i2, u2, i4, u4 (int8 to uint32)")),
        };
        Ok(Some(Element { dtype, big_endian }))
    }
}

/// The subset of Python literals that `.npy` headers use.
enum Value {
    Str(String),
    Int(i64),
    Bool(bool),
    List(Vec<Value>),
    Dict(Vec<(String, Value)>),
}

struct Literal<'a> {
    text: &'a str,
    pos: usize,
    /// Brackets open at `pos`.
    depth: usize,
}

impl Literal<'_> {
    fn skip_space(&mut self) {
        let rest = &self.text[self.pos..];
        self.pos += rest.len() - rest.trim_start().len();
    }

    fn peek(&mut self) -> Option<char> {
        self.skip_space();
        self.text[self.pos..].chars().next()
    }

    fn expect(&mut self, c: char) -> Result<()> {
        if self.peek() == Some(c) {
            self.pos += c.len_utf8();
            Ok(())
        } else {
            Err(bad(format!("expected '{c}' at header position {}", self.pos)))
        }
    }

    /// Items up to `close`, allowing a trailing comma, as Python does.
    fn items<T>(&mut self, close: char, mut item: impl FnMut(&mut Self) -> Result<T>) -> Result<Vec<T>> {
        let mut out = Vec::new();
        loop {
            if self.peek() == Some(close) {
                self.pos += 1;
                return Ok(out);
            }
            out.push(item(self)?);
            match self.peek() {
                Some(',') => self.pos += 1,
                Some(c) if c == close => {}
                _ => return Err(bad(format!("expected ',' or '{close}' at header position {}", self.pos))),
            }
        }
    }

    /// Step into a bracket, refusing nesting deeper than any real header has.
    fn open(&mut self) -> Result<()> {
        self.depth += 1;
        if self.depth > MAX_HEADER_DEPTH {
            return Err(bad(format!("the header nests brackets more than {MAX_HEADER_DEPTH} deep")));
        }
        self.pos += 1;
        Ok(())
    }

    fn value(&mut self) -> Result<Value> {
        match self.peek() {
            Some('{') => {
                self.open()?;
                let items = self.items('}', |p| {
                    let Value::Str(key) = p.value()? else { return Err(bad("a header key is not a string")) };
                    p.expect(':')?;
                    Ok((key, p.value()?))
                })?;
                self.depth -= 1;
                Ok(Value::Dict(items))
            }
            Some(open @ ('(' | '[')) => {
                self.open()?;
                let close = if open == '(' { ')' } else { ']' };
                let items = self.items(close, Self::value)?;
                self.depth -= 1;
                Ok(Value::List(items))
            }
            Some(quote @ ('\'' | '"')) => {
                let body = &self.text[self.pos + 1..];
                let end = body.find(quote).ok_or_else(|| bad("a string in the header is not closed"))?;
                self.pos += end + 2;
                Ok(Value::Str(body[..end].to_string()))
            }
            Some(c) if c.is_ascii_digit() || c == '-' => {
                let rest = &self.text[self.pos..];
                let len = rest
                    .char_indices()
                    .find(|&(i, ch)| !(ch.is_ascii_digit() || (i == 0 && ch == '-') || ch == 'L'))
                    .map_or(rest.len(), |(i, _)| i);
                let digits = rest[..len].trim_end_matches('L');
                self.pos += len;
                digits.parse().map(Value::Int).map_err(|_| bad(format!("'{digits}' is not an integer")))
            }
            _ => {
                for (word, value) in [("True", true), ("False", false)] {
                    if self.text[self.pos..].starts_with(word) {
                        self.pos += word.len();
                        return Ok(Value::Bool(value));
                    }
                }
                Err(bad(format!("unexpected text at header position {}", self.pos)))
            }
        }
    }
}

/// Serialise f32 values of `shape` (row-major) as a version 1.0 `.npy` file.
pub fn write_f32(values: &[f32], shape: &[usize]) -> Vec<u8> {
    let dims = match shape {
        [n] => format!("({n},)"),
        _ => format!("({})", shape.iter().map(usize::to_string).collect::<Vec<_>>().join(", ")),
    };
    let mut header = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': {dims}, }}");
    // Pad so that magic (6) + version (2) + length (2) + header ends on a 64-byte boundary.
    let unpadded = 10 + header.len() + 1;
    header.push_str(&" ".repeat((64 - unpadded % 64) % 64));
    header.push('\n');
    let mut out = Vec::with_capacity(10 + header.len() + values.len() * 4);
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&[1, 0]);
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    out.extend_from_slice(header.as_bytes());
    for v in values {
        out.extend_from_slice(&v.to_le_bytes());
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tensor;

    #[test]
    fn written_files_read_back() {
        for shape in [vec![], vec![5], vec![2, 3], vec![2, 1, 2]] {
            let n: usize = shape.iter().product();
            let values: Vec<f32> = (0..n).map(|i| i as f32 * 0.5 - 1.0).collect();
            let bytes = write_f32(&values, &shape);
            assert_eq!((bytes.len() - 4 * n) % 64, 0, "data starts on a 64-byte boundary");
            let listing = tensor::list(&bytes[..], ReadOptions::default()).unwrap();
            let entry = listing.choose(None).unwrap();
            assert_eq!(entry.shape, shape);
            let t = tensor::read(&bytes[..], entry).unwrap();
            assert_eq!(t.values.iter().copied().collect::<Vec<_>>(), values);
        }
    }

    #[test]
    fn tensors_larger_than_one_read_chunk_read_back() {
        let n = (1 << 20) + 5; // = 3 × 349527, one element past a whole number of chunks
        let values: Vec<f32> = (0..n).map(|i| (i % 1000) as f32 - 500.0).collect();
        let bytes = write_f32(&values, &[3, n / 3]);
        let listing = tensor::list(&bytes[..], ReadOptions::default()).unwrap();
        let t = tensor::read(&bytes[..], listing.choose(None).unwrap()).unwrap();
        assert!(t.values.as_slice().unwrap() == &values[..], "values differ after a chunked read");
    }

    #[test]
    fn header_literals_parse_with_python_spacing() {
        let f = HeaderFields::parse("{'descr': '>i2', 'fortran_order': True, 'shape': (3, 4, ), }  \n").unwrap();
        assert_eq!((f.descr.as_str(), f.fortran_order, f.shape, f.itemsize), (">i2", true, vec![3, 4], 2));
        assert!(HeaderFields::parse("{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (2,)}").is_err());
        assert!(HeaderFields::parse("{'descr': '<f4', 'shape': (2,)}").is_err());
        assert!(HeaderFields::parse("{'descr': '<f4', 'fortran_order': False, 'shape': (-2,)}").is_err());
        assert!(HeaderFields::parse("{'descr': '<f4'").is_err());
        let twice = HeaderFields::parse("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), 'descr': '<f2'}");
        assert!(twice.is_err_and(|e| e.to_string().contains("the header gives 'descr' twice")));
    }

    fn npy_v2(header: &str) -> Vec<u8> {
        let mut out = MAGIC.to_vec();
        out.extend_from_slice(&[2, 0]);
        out.extend_from_slice(&(header.len() as u32).to_le_bytes());
        out.extend_from_slice(header.as_bytes());
        out
    }

    /// NEP 1: the header length is a u32 in version 2.0, so a file can claim 4 GiB of header.
    #[test]
    fn header_length_past_the_cap_is_refused_before_reading() {
        let mut file = npy_v2("{}");
        file[8..12].copy_from_slice(&u32::MAX.to_le_bytes());
        let message = read_header(&file[..], ReadOptions::default()).unwrap_err().to_string();
        assert!(message.contains(&format!("claims {} bytes, more than the {MAX_HEADER_BYTES} allowed", u32::MAX)), "{message}");
    }

    /// NEP 1: the header is a dict literal whose shape is a tuple; deeper nesting is hostile.
    #[test]
    fn deeply_nested_headers_are_refused_without_exhausting_the_stack() {
        let deep = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': {}}}", "(".repeat(200_000));
        let message = read_header(&npy_v2(&deep)[..], ReadOptions::default()).unwrap_err().to_string();
        assert!(message.contains("nests brackets more than"), "{message}");
        assert!(HeaderFields::parse("{'descr': '<f4', 'fortran_order': False, 'shape': ((2,),)}").is_err(), "nesting within the cap still parses, then fails on content");
    }

    /// A header that lies about the size: its shape needs more bytes than the file holds.
    /// NumPy's type codes count bytes (the NumPy manual, "Data type objects"): '<i8' is int64,
    /// and the message must not read as if int8 were refused.
    #[test]
    fn sixty_four_bit_integers_are_named_as_such() {
        let header = |descr: &str| npy_v2(&format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': (2, 2), }}"));
        let message = read_header(&header("<i8")[..], ReadOptions::default()).unwrap_err().to_string();
        assert!(message.contains("64-bit integers (int64, uint64)"), "{message}");
        let message = read_header(&header("<m8")[..], ReadOptions::default()).unwrap_err().to_string();
        assert!(message.contains("i1, u1, i2, u2, i4, u4 (int8 to uint32)"), "{message}");
    }

    #[test]
    fn shapes_larger_than_the_data_are_refused() {
        let file = npy_v2("{'descr': '<f4', 'fortran_order': False, 'shape': (1000, 1000), }");
        let needed = file.len() as u64 + 4_000_000;
        let error = read_header(&file[..], ReadOptions::default()).unwrap_err();
        assert_eq!(error, Error::Truncated { what: "array data", needed, available: file.len() as u64 });
    }

    #[test]
    fn refuses_objects_and_raw_pairs_unless_asked() {
        let f = HeaderFields::parse("{'descr': '|O', 'fortran_order': False, 'shape': (2,)}").unwrap();
        assert!(matches!(f.element(ReadOptions::default()), Err(Error::UnsupportedDtype { .. })));
        let f = HeaderFields::parse("{'descr': '<V2', 'fortran_order': False, 'shape': (2,)}").unwrap();
        assert!(f.element(ReadOptions::default()).is_err());
        let e = f.element(ReadOptions { raw16_as_bf16: true }).unwrap().unwrap();
        assert_eq!(e.dtype, DType::BF16);
    }
}
