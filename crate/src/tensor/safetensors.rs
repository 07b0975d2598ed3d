//! `.safetensors` files, read lazily.
//!
//! Layout, from the format's published specification: an unsigned 64-bit little-endian header
//! size N, then N bytes of UTF-8 JSON mapping each tensor name to `dtype`, `shape` and
//! `data_offsets` [begin, end) relative to the byte after the header (plus an optional
//! `__metadata__` map of strings), then the data, little-endian and row-major. Listing reads the
//! header alone; a tensor is then read from its own byte range.
//!
//! The same description promises that "addresses in the file do not overlap in any way", so a
//! reader never holds more than the file's size; a header whose ranges overlap, leave the data
//! or disagree with dtype × shape is refused whole. Gaps between ranges are tolerated. Listing
//! does not apply the tool's element cap ([`super::MAX_ELEMENTS`]): a shard may hold tensors
//! too large to analyse and still be costed from its header; reading one refuses it.

use super::{read_range, ByteSource, DType, Element, TensorEntry};
use crate::error::{Error, Result};
use serde::de::{Deserialize, Deserializer, Error as _, MapAccess, Visitor};
use serde_json::Value;

/// Headers larger than this are refused before they are read: the format's description sets
/// the same 100 MB bound against headers built to exhaust memory (a JSON tree costs several
/// times its text). A shard's real header is a few hundred bytes per tensor.
pub const MAX_HEADER_BYTES: u64 = 100_000_000;

const FORMAT: &str = "safetensors";

fn bad(detail: impl Into<String>) -> Error {
    Error::BadFormat { format: FORMAT, detail: detail.into() }
}

/// Byte size of each element type name the format defines, and how to decode the supported ones.
fn element_of(label: &str) -> (Option<usize>, Option<Element>) {
    let dtype = match label {
        "F16" => DType::F16,
        "BF16" => DType::BF16,
        "F32" => DType::F32,
        "F64" => DType::F64,
        "I8" => DType::I8,
        "U8" => DType::U8,
        "I16" => DType::I16,
        "U16" => DType::U16,
        "I32" => DType::I32,
        "U32" => DType::U32,
        "BOOL" | "F8_E4M3" | "F8_E5M2" => return (Some(1), None),
        "I64" | "U64" | "F64_C" | "C64" => return (Some(8), None),
        _ => return (None, None),
    };
    (Some(dtype.size()), Some(Element::little(dtype)))
}

/// The header's top-level entries in file order. A name given twice is refused, as the format's
/// description says ("Duplicate keys are disallowed"): a JSON map would silently keep one.
struct Entries(Vec<(String, Value)>);

impl<'de> Deserialize<'de> for Entries {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct Distinct;
        impl<'de> Visitor<'de> for Distinct {
            type Value = Entries;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> std::result::Result<Entries, A::Error> {
                let mut seen = std::collections::HashSet::new();
                let mut entries = Vec::new();
                while let Some((name, value)) = map.next_entry::<String, Value>()? {
                    if !seen.insert(name.clone()) {
                        return Err(A::Error::custom(format!("the name '{name}' appears twice")));
                    }
                    entries.push((name, value));
                }
                Ok(Entries(entries))
            }
        }
        deserializer.deserialize_map(Distinct)
    }
}

/// The header's entries, and where the data starts.
fn header<S: ByteSource + ?Sized>(src: &S) -> Result<(Entries, u64)> {
    let size_field = read_range(src, 0, 8, "header size")?;
    let header_len = u64::from_le_bytes(size_field.try_into().expect("eight bytes"));
    if header_len > MAX_HEADER_BYTES {
        return Err(bad(format!("the header claims {header_len} bytes, more than the {MAX_HEADER_BYTES} allowed")));
    }
    let text = read_range(src, 8, header_len, "header")?;
    let entries = serde_json::from_slice(&text).map_err(|e| match e.classify() {
        serde_json::error::Category::Data => bad(format!("the header is not an object of distinct names ({e})")),
        _ => bad(format!("the header is not valid JSON ({e})")),
    })?;
    Ok((entries, 8 + header_len))
}

/// List every tensor from the header alone.
pub fn read_header<S: ByteSource + ?Sized>(src: &S) -> Result<Vec<TensorEntry>> {
    let (Entries(map), data_start) = header(src)?;
    // header() has read up to data_start, so the source is at least that long.
    let data_len = src.len() - data_start;
    let mut entries = Vec::with_capacity(map.len());
    for (name, info) in &map {
        if name == "__metadata__" {
            continue;
        }
        entries.push(entry(name, info, data_start, data_len)?);
    }
    refuse_overlaps(&entries)?;
    Ok(entries)
}

/// Refuse two tensors that share a byte (empty tensors share none).
fn refuse_overlaps(entries: &[TensorEntry]) -> Result<()> {
    let mut ranges: Vec<&TensorEntry> = entries.iter().filter(|e| e.bytes > 0).collect();
    ranges.sort_unstable_by_key(|e| e.offset);
    for pair in ranges.windows(2) {
        let (a, b) = (pair[0], pair[1]);
        // Both ranges were checked to end within the source, so these sums do not overflow.
        if a.offset + a.bytes > b.offset {
            return Err(bad(format!(
                "tensors '{}' and '{}' overlap (bytes {}..{} and {}..{} of the file)",
                a.name,
                b.name,
                a.offset,
                a.offset + a.bytes,
                b.offset,
                b.offset + b.bytes
            )));
        }
    }
    Ok(())
}

fn entry(name: &str, info: &Value, data_start: u64, data_len: u64) -> Result<TensorEntry> {
    let field = |key: &str| info.get(key).ok_or_else(|| bad(format!("tensor '{name}' has no '{key}'")));
    let dtype_label = field("dtype")?
        .as_str()
        .ok_or_else(|| bad(format!("tensor '{name}' has a dtype that is not a string")))?
        .to_string();
    let shape = field("shape")?
        .as_array()
        .and_then(|dims| dims.iter().map(|d| d.as_u64().and_then(|d| usize::try_from(d).ok())).collect::<Option<Vec<_>>>())
        .ok_or_else(|| bad(format!("tensor '{name}' has a shape that is not a list of sizes")))?;
    let offsets = field("data_offsets")?
        .as_array()
        .and_then(|o| match o.as_slice() {
            [b, e] => Some((b.as_u64()?, e.as_u64()?)),
            _ => None,
        })
        .ok_or_else(|| bad(format!("tensor '{name}' has data_offsets that are not two byte positions")))?;
    let (begin, end) = offsets;
    if begin > end {
        return Err(bad(format!("tensor '{name}' has data_offsets [{begin}, {end}] that end before they begin")));
    }
    if end > data_len {
        return Err(Error::Truncated { what: "tensor data", needed: data_start.saturating_add(end), available: data_start + data_len });
    }
    let bytes = end - begin;
    let count = shape.iter().try_fold(1u64, |acc, &d| acc.checked_mul(d as u64));
    let (itemsize, element) = element_of(&dtype_label);
    match (count, itemsize) {
        (None, _) => return Err(bad(format!("tensor '{name}' has a shape {shape:?} whose element count overflows"))),
        (Some(count), Some(itemsize)) if count.checked_mul(itemsize as u64) != Some(bytes) => {
            return Err(bad(format!(
                "tensor '{name}' has {bytes} bytes of data but its shape {shape:?} of {dtype_label} needs {}",
                count.saturating_mul(itemsize as u64)
            )))
        }
        // A dtype this reader does not know still has at least one bit per element.
        (Some(count), None) if count > bytes.saturating_mul(8) => {
            return Err(bad(format!("tensor '{name}' has {bytes} bytes of data, too few for the {count} elements of its shape {shape:?}")))
        }
        _ => {}
    }
    Ok(TensorEntry {
        name: name.to_string(),
        dtype_label,
        element,
        shape,
        offset: data_start + begin,
        bytes,
        fortran_order: false,
    })
}

/// The `__metadata__` map of a `.safetensors` file (empty when it has none).
pub fn read_metadata<S: ByteSource + ?Sized>(src: &S) -> Result<std::collections::BTreeMap<String, String>> {
    let (Entries(entries), _) = header(src)?;
    let mut out = std::collections::BTreeMap::new();
    if let Some((_, Value::Object(meta))) = entries.iter().find(|(name, _)| name == "__metadata__") {
        for (k, v) in meta {
            let text = v.as_str().ok_or_else(|| bad(format!("metadata '{k}' is not a string")))?;
            out.insert(k.clone(), text.to_string());
        }
    }
    Ok(out)
}

/// One tensor to write: name, dtype name (as the format spells it), shape, little-endian bytes.
pub struct Outgoing<'a> {
    /// Tensor name.
    pub name: &'a str,
    /// dtype name, for example "U8" or "F16".
    pub dtype: &'static str,
    /// Shape.
    pub shape: Vec<usize>,
    /// The data.
    pub data: Vec<u8>,
}

/// Serialise tensors and string metadata as a `.safetensors` file (header padded with spaces to
/// a multiple of 8 bytes, as the format's reference writer does).
pub fn write(tensors: &[Outgoing], metadata: &std::collections::BTreeMap<String, String>) -> Vec<u8> {
    let mut header = serde_json::Map::new();
    if !metadata.is_empty() {
        header.insert("__metadata__".into(), serde_json::to_value(metadata).expect("strings"));
    }
    let mut offset = 0usize;
    for t in tensors {
        header.insert(
            t.name.to_string(),
            serde_json::json!({ "dtype": t.dtype, "shape": t.shape, "data_offsets": [offset, offset + t.data.len()] }),
        );
        offset += t.data.len();
    }
    let mut text = Value::Object(header).to_string();
    while !text.len().is_multiple_of(8) {
        text.push(' ');
    }
    let mut out = Vec::with_capacity(8 + text.len() + offset);
    out.extend_from_slice(&(text.len() as u64).to_le_bytes());
    out.extend_from_slice(text.as_bytes());
    for t in tensors {
        out.extend_from_slice(&t.data);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tensor::{self, ReadOptions};

    fn file(header: &str, data: &[u8]) -> Vec<u8> {
        let mut out = (header.len() as u64).to_le_bytes().to_vec();
        out.extend_from_slice(header.as_bytes());
        out.extend_from_slice(data);
        out
    }

    #[test]
    fn lists_then_reads_one_range() {
        let mut data = Vec::new();
        data.extend_from_slice(&[1u8, 255]);
        for v in [1.5f32, -2.0] {
            data.extend_from_slice(&v.to_le_bytes());
        }
        data.push(1);
        let bytes = file(
            r#"{"__metadata__":{"k":"v"},"w":{"dtype":"F32","shape":[1,2],"data_offsets":[2,10]},"m":{"dtype":"I8","shape":[2],"data_offsets":[0,2]},"b":{"dtype":"BOOL","shape":[1],"data_offsets":[10,11]}}"#,
            &data,
        );
        let listing = tensor::list(&bytes[..], ReadOptions::default()).unwrap();
        let names: Vec<_> = listing.entries.iter().map(|e| e.name.as_str()).collect();
        assert_eq!(names, ["b", "m", "w"]);
        let w = tensor::read(&bytes[..], listing.choose(Some("w")).unwrap()).unwrap();
        assert_eq!(w.values.as_slice().unwrap(), &[1.5, -2.0]);
        let m = tensor::read(&bytes[..], listing.choose(Some("m")).unwrap()).unwrap();
        assert_eq!(m.values.as_slice().unwrap(), &[1.0, -1.0]);
        assert!(matches!(tensor::read(&bytes[..], listing.choose(Some("b")).unwrap()), Err(Error::UnsupportedDtype { .. })));
        assert!(matches!(listing.choose(Some("x")), Err(Error::NoSuchTensor { .. })));
        assert!(matches!(listing.choose(None), Err(Error::TensorNotChosen { count: 3 })));
    }

    /// Counts the bytes a reader asks for.
    struct Counting<'a>(&'a [u8], std::cell::Cell<u64>);

    impl ByteSource for Counting<'_> {
        fn len(&self) -> u64 {
            self.0.len() as u64
        }
        fn read_at(&self, offset: u64, buf: &mut [u8]) -> Result<()> {
            self.1.set(self.1.get() + buf.len() as u64);
            self.0.read_at(offset, buf)
        }
    }

    #[test]
    fn listing_reads_the_header_only_and_reading_one_tensor_reads_its_range_only() {
        let header = r#"{"a":{"dtype":"F32","shape":[1000,1000],"data_offsets":[0,4000000]},"b":{"dtype":"F16","shape":[3],"data_offsets":[4000000,4000006]}}"#;
        let bytes = file(header, &vec![0u8; 4_000_006]);
        let src = Counting(&bytes, std::cell::Cell::new(0));
        let listing = tensor::list(&src, ReadOptions::default()).unwrap();
        assert!(src.1.get() <= 16 + 8 + header.len() as u64, "listing read {} bytes", src.1.get());
        src.1.set(0);
        tensor::read(&src, listing.choose(Some("b")).unwrap()).unwrap();
        assert_eq!(src.1.get(), 6);
    }

    #[test]
    fn refuses_lying_headers() {
        let lying_size = file(r#"{"w":{"dtype":"F32","shape":[3],"data_offsets":[0,8]}}"#, &[0; 8]);
        assert!(matches!(read_header(&lying_size[..]), Err(Error::BadFormat { .. })));
        let past_end = file(r#"{"w":{"dtype":"F32","shape":[2],"data_offsets":[0,8]}}"#, &[0; 4]);
        assert!(matches!(read_header(&past_end[..]), Err(Error::Truncated { .. })));
        let mut huge = u64::MAX.to_le_bytes().to_vec();
        huge.push(b'{');
        assert!(matches!(read_header(&huge[..]), Err(Error::BadFormat { .. })));
        let cut = &file(r#"{"w":{}}"#, &[])[..10];
        assert!(matches!(read_header(cut), Err(Error::Truncated { .. })));
        let not_json = file("{nope", &[]);
        assert!(matches!(read_header(&not_json[..]), Err(Error::BadFormat { .. })));
        let backwards = file(r#"{"w":{"dtype":"F32","shape":[0],"data_offsets":[8,0]}}"#, &[0; 8]);
        assert!(read_header(&backwards[..]).unwrap_err().to_string().contains("end before they begin"));
        let overflowing = file(r#"{"w":{"dtype":"F32","shape":[4294967296,4294967296,4294967296],"data_offsets":[0,8]}}"#, &[0; 8]);
        assert!(read_header(&overflowing[..]).unwrap_err().to_string().contains("element count overflows"));
        let unknown_type = file(r#"{"w":{"dtype":"X9","shape":[100],"data_offsets":[0,8]}}"#, &[0; 8]);
        assert!(read_header(&unknown_type[..]).unwrap_err().to_string().contains("too few for the 100 elements"));
    }

    /// The format's description: "Duplicate keys are disallowed".
    #[test]
    fn refuses_a_name_given_twice() {
        let twice = file(
            r#"{"w":{"dtype":"U8","shape":[2],"data_offsets":[0,2]},"w":{"dtype":"U8","shape":[2],"data_offsets":[2,4]}}"#,
            &[0; 4],
        );
        let message = read_header(&twice[..]).unwrap_err().to_string();
        assert!(message.contains("the name 'w' appears twice"), "{message}");
        let array = file("[1, 2]", &[]);
        assert!(read_header(&array[..]).unwrap_err().to_string().contains("not an object of distinct names"));
    }

    /// The format's description: "addresses in the file do not overlap in any way".
    #[test]
    fn refuses_overlapping_ranges_and_accepts_gaps_and_empty_tensors() {
        let overlapping = file(
            r#"{"a":{"dtype":"U8","shape":[6],"data_offsets":[0,6]},"b":{"dtype":"U8","shape":[4],"data_offsets":[4,8]}}"#,
            &[0; 8],
        );
        let message = read_header(&overlapping[..]).unwrap_err().to_string();
        assert!(message.contains("tensors 'a' and 'b' overlap"), "{message}");
        let same = file(r#"{"a":{"dtype":"U8","shape":[4],"data_offsets":[0,4]},"b":{"dtype":"I8","shape":[4],"data_offsets":[0,4]}}"#, &[0; 4]);
        assert!(read_header(&same[..]).is_err());
        let gaps_and_empty = file(
            r#"{"a":{"dtype":"U8","shape":[2],"data_offsets":[0,2]},"e":{"dtype":"F32","shape":[0,3],"data_offsets":[1,1]},"b":{"dtype":"U8","shape":[2],"data_offsets":[4,6]}}"#,
            &[0; 6],
        );
        assert_eq!(read_header(&gaps_and_empty[..]).unwrap().len(), 3);
    }

    #[test]
    fn names_and_types_from_the_file_stay_on_one_line_in_messages() {
        let odd = file("{\"line\\nbreak\":{\"dtype\":\"F32\",\"shape\":[3],\"data_offsets\":[0,4]}}", &[0; 4]);
        let message = read_header(&odd[..]).unwrap_err().to_string();
        assert!(!message.contains('\n') && message.contains("line\\nbreak"), "{message}");
        let odd_type = file("{\"w\":{\"dtype\":\"F\\n1\",\"shape\":[1],\"data_offsets\":[0,4]}}", &[0; 4]);
        let listing = tensor::list(&odd_type[..], ReadOptions::default()).unwrap();
        let message = tensor::read(&odd_type[..], &listing.entries[0]).unwrap_err().to_string();
        assert!(!message.contains('\n'), "{message}");
    }
}
