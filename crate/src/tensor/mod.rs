//! Tensors in, as a 2-D `f32` view.
//!
//! Every reader works over a [`ByteSource`] ("read this byte range"), so a whole file, a memory
//! slice and a browser `Blob` serve the same code, and a large `.safetensors` file is listed from
//! its header alone before one tensor's own byte range is read.
//!
//! Shape convention (common practice for linear layers, y = x·Wᵀ): a 2-D tensor is
//! [rows = output channels, cols = input channels]; 1-D is one row; N-D with N ≥ 3 is viewed as
//! [dim0, product of the rest] (convolution kernels); a 0-D scalar is 1×1.

pub mod dtype;
pub mod npy;
pub mod safetensors;
pub mod text;

use crate::error::{Error, Result};
use crate::rows;
use crate::simd::finite_extremes;
use ndarray::Array2;
use serde::Serialize;

pub use dtype::{DType, Element};

/// Largest element count the tool will load. In wasm, the most f32 values one array can hold
/// (wasm32 addresses 4 GiB, and Rust caps an allocation at `isize::MAX` bytes, 2 GiB): the plain
/// round-to-nearest analysis needs about 1.1 copies of the tensor, so it runs on the largest;
/// other runs keep a reconstruction and more, and where the 4 GiB do not hold them the page
/// refuses them first ([`crate::footprint`]).
#[cfg(target_arch = "wasm32")]
pub const MAX_ELEMENTS: usize = isize::MAX as usize / 4;
/// Largest element count the tool will load natively (16 GiB of f32).
#[cfg(not(target_arch = "wasm32"))]
pub const MAX_ELEMENTS: usize = 1 << 32;

/// Elements decoded per read when loading a tensor (4 MiB of f32): their raw bytes are all that
/// sits in memory beside the f32 values. (The page's file source fetches larger ranges outside
/// the wasm memory; see `BlobSource` in `wasm.rs`.)
const READ_CHUNK_ELEMENTS: usize = 1 << 20;

/// Elements per block when a read range is decoded on the pool's threads.
const DECODE_BLOCK_ELEMENTS: usize = 1 << 16;

/// Random access to bytes: a file, a memory buffer or a browser `Blob`.
pub trait ByteSource {
    /// Total length in bytes.
    fn len(&self) -> u64;
    /// Fill `buf` with the bytes starting at `offset`; the caller has checked the range.
    fn read_at(&self, offset: u64, buf: &mut [u8]) -> Result<()>;
    /// True when the source holds no bytes.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

impl ByteSource for [u8] {
    fn len(&self) -> u64 {
        <[u8]>::len(self) as u64
    }
    fn read_at(&self, offset: u64, buf: &mut [u8]) -> Result<()> {
        let start = usize::try_from(offset).map_err(|_| Error::Io { message: "offset out of range".into() })?;
        let end = start.checked_add(buf.len()).filter(|&end| end <= <[u8]>::len(self));
        match end {
            Some(end) => {
                buf.copy_from_slice(&self[start..end]);
                Ok(())
            }
            None => Err(Error::Io { message: "read past the end of the buffer".into() }),
        }
    }
}

#[cfg(not(target_arch = "wasm32"))]
impl ByteSource for std::fs::File {
    fn len(&self) -> u64 {
        self.metadata().map(|m| m.len()).unwrap_or(0)
    }
    fn read_at(&self, offset: u64, buf: &mut [u8]) -> Result<()> {
        #[cfg(unix)]
        {
            std::os::unix::fs::FileExt::read_exact_at(self, buf, offset)?;
        }
        #[cfg(not(unix))]
        {
            use std::io::{Read, Seek, SeekFrom};
            let mut file = self;
            file.seek(SeekFrom::Start(offset))?;
            file.read_exact(buf)?;
        }
        Ok(())
    }
}

/// Read `len` bytes at `offset`, refusing ranges that leave the source.
pub(crate) fn read_range<S: ByteSource + ?Sized>(src: &S, offset: u64, len: u64, what: &'static str) -> Result<Vec<u8>> {
    let available = src.len();
    let needed = offset.checked_add(len).ok_or(Error::Truncated { what, needed: u64::MAX, available })?;
    if needed > available {
        return Err(Error::Truncated { what, needed, available });
    }
    let len = usize::try_from(len).map_err(|_| Error::BadShape {
        shape: vec![],
        detail: format!("{len} bytes cannot be addressed on this machine"),
    })?;
    let mut buf = vec![0u8; len];
    src.read_at(offset, &mut buf)?;
    Ok(buf)
}

/// One tensor as a file lists it, before any of its data is read.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TensorEntry {
    /// Name in the file ("" for a `.npy` file, which holds one unnamed array).
    pub name: String,
    /// The element type as the file spells it.
    pub dtype_label: String,
    /// How to decode the elements, or `None` when the type is not supported.
    #[serde(skip)]
    pub element: Option<Element>,
    /// Shape as stored.
    pub shape: Vec<usize>,
    /// Absolute offset of the first data byte in the source.
    pub offset: u64,
    /// Length of the data in bytes.
    pub bytes: u64,
    /// Whether the data is stored in column-major (Fortran) order.
    pub fortran_order: bool,
}

/// The container formats the tool reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum FileKind {
    /// NumPy `.npy`, one array.
    Npy,
    /// `.safetensors`, a JSON header and named tensors.
    Safetensors,
}

/// Options for reading.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ReadOptions {
    /// Treat raw 2-byte elements (`.npy` descr `V2` or `u2`) as bfloat16 bit patterns.
    pub raw16_as_bf16: bool,
}

/// What a file holds.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Listing {
    /// Container format.
    pub kind: FileKind,
    /// Its tensors, in natural name order.
    pub entries: Vec<TensorEntry>,
}

impl Listing {
    /// The entry to read: by name, or the only one when no name is given.
    pub fn choose(&self, name: Option<&str>) -> Result<&TensorEntry> {
        match name {
            Some(name) => self.entries.iter().find(|e| e.name == name).ok_or_else(|| Error::NoSuchTensor {
                name: name.to_string(),
                available: self.entries.iter().filter(|e| !e.name.is_empty()).take(8).map(|e| e.name.clone()).collect(),
                count: self.entries.len(),
            }),
            None if self.entries.len() == 1 => Ok(&self.entries[0]),
            None => Err(Error::TensorNotChosen { count: self.entries.len() }),
        }
    }
}

/// Identify the container from its first bytes and list its tensors (header only).
pub fn list<S: ByteSource + ?Sized>(src: &S, opts: ReadOptions) -> Result<Listing> {
    let head = read_range(src, 0, src.len().min(16), "file start")?;
    let (kind, mut entries) = if head.starts_with(npy::MAGIC) {
        (FileKind::Npy, vec![npy::read_header(src, opts)?])
    } else if head.len() > 8 && head[8] == b'{' {
        (FileKind::Safetensors, safetensors::read_header(src)?)
    } else if head.is_empty() {
        return Err(Error::BadFormat { format: "tensor", detail: "the file is empty".into() });
    } else {
        return Err(Error::BadFormat {
            format: "tensor",
            detail: "it starts neither with the NumPy .npy magic nor with a safetensors header".into(),
        });
    };
    entries.sort_by(|a, b| natural_cmp(&a.name, &b.name));
    Ok(Listing { kind, entries })
}

/// Read one listed tensor's data (its own byte range only) into the 2-D f32 view.
pub fn read<S: ByteSource + ?Sized>(src: &S, entry: &TensorEntry) -> Result<Tensor> {
    let element = entry.element.ok_or_else(|| Error::UnsupportedDtype {
        dtype: entry.dtype_label.clone(),
        hint: format!("supported types are {}", DType::SUPPORTED),
    })?;
    let (rows, cols) = view_2d(&entry.shape)?;
    let count = rows * cols;
    let size = element.dtype.size();
    // count ≤ MAX_ELEMENTS and size ≤ 8, so the product fits in 64 bits.
    let needed = count as u64 * size as u64;
    if entry.bytes != needed {
        return Err(Error::BadFormat {
            format: "tensor",
            detail: format!("'{}' has {} bytes but its shape needs {needed}", entry.name, entry.bytes),
        });
    }
    let available = src.len();
    if entry.offset.checked_add(entry.bytes).is_none_or(|end| end > available) {
        return Err(Error::Truncated { what: "tensor data", needed: entry.offset.saturating_add(entry.bytes), available });
    }
    let values = read_values(src, entry.offset, element, count, READ_CHUNK_ELEMENTS)?;
    let values = if entry.fortran_order && entry.shape.len() > 1 { fortran_to_c(values, &entry.shape) } else { values };
    let values = Array2::from_shape_vec((rows, cols), values).expect("length checked by view_2d");
    Ok(Tensor { name: entry.name.clone(), dtype: element.dtype, shape: entry.shape.clone(), values })
}

/// Little-endian `dtype` values in bytes already in memory (a trailing partial value is ignored),
/// decoded as a file's tensor data is.
pub fn decode_little_endian(dtype: DType, bytes: &[u8]) -> Vec<f32> {
    let count = bytes.len() / dtype.size();
    read_values(bytes, 0, Element::little(dtype), count, READ_CHUNK_ELEMENTS).expect("bytes in memory are always there to read")
}

/// `count` elements stored from byte `offset` of `src`, read `chunk_elements` (at least one) at a
/// time and decoded to f32 on the pool's threads, so that the raw bytes never sit in memory
/// beside the whole f32 copy.
pub(crate) fn read_values<S: ByteSource + ?Sized>(src: &S, offset: u64, element: Element, count: usize, chunk_elements: usize) -> Result<Vec<f32>> {
    let size = element.dtype.size();
    let chunk_elements = chunk_elements.max(1);
    // Not zeroed first: the decode writes every value, and memory touched only once costs less
    // (zeroing fresh browser memory took up to 0.4 s for a 4096 × 14336 layer).
    let mut values: Vec<f32> = Vec::with_capacity(count);
    let mut raw = vec![0u8; chunk_elements.min(count) * size];
    for (i, out) in values.spare_capacity_mut()[..count].chunks_mut(chunk_elements).enumerate() {
        let bytes = &mut raw[..out.len() * size];
        // Within [offset, offset + count × size), which the caller checked against the length.
        src.read_at(offset + (i * chunk_elements) as u64 * size as u64, bytes)?;
        let bytes = &*bytes;
        crate::rows::map_chunks_mut(out, 1, DECODE_BLOCK_ELEMENTS, &mut |_, _| {}, |first, block| {
            element.decode(&bytes[first * size..(first + block.len()) * size], block)
        });
    }
    // SAFETY: the ranges cover all `count` values, the blocks cover each range, and `decode`
    // writes every value of its block (it checks that its bytes hold exactly that many).
    unsafe { values.set_len(count) };
    Ok(values)
}

/// Reorder column-major data into row-major order for the same shape.
fn fortran_to_c(values: Vec<f32>, shape: &[usize]) -> Vec<f32> {
    use ndarray::{ArrayD, IxDyn, ShapeBuilder};
    let array = ArrayD::from_shape_vec(IxDyn(shape).f(), values).expect("length matches shape");
    array.as_standard_layout().iter().copied().collect()
}

/// The number of elements of a shape, refusing shapes this build cannot hold, before anything
/// is allocated for them.
///
/// The cap applies to the product of the non-zero axes, not only to the element count: a shape
/// such as [2^40, 0] holds nothing, yet its rows would still size per-row arrays, and ndarray
/// refuses any shape whose non-zero axes overflow `isize`.
pub fn element_count(shape: &[usize]) -> Result<usize> {
    let extent = shape.iter().filter(|&&d| d != 0).try_fold(1usize, |acc, &d| acc.checked_mul(d));
    let refused = |detail: String| Err(Error::BadShape { shape: shape.to_vec(), detail });
    match extent {
        None => refused("its element count overflows".into()),
        Some(extent) if extent > MAX_ELEMENTS && shape.contains(&0) => refused(format!(
            "it holds no elements, but its other axes span {extent}, more than the {MAX_ELEMENTS} this build holds"
        )),
        Some(count) if count > MAX_ELEMENTS => refused(format!(
            "its {count} elements need {:.1} GiB as f32; this build holds at most {MAX_ELEMENTS} elements",
            count as f64 * 4.0 / (1u64 << 30) as f64
        )),
        Some(_) if shape.contains(&0) => Ok(0),
        Some(count) => Ok(count),
    }
}

/// The 2-D view [rows, cols] of a stored shape.
pub fn view_2d(shape: &[usize]) -> Result<(usize, usize)> {
    let count = element_count(shape)?;
    Ok(match shape {
        [] => (1, 1),
        [n] => (1, *n),
        [rows, ..] if *rows == 0 => (0, element_count(&shape[1..])?),
        [rows, ..] => (*rows, count / rows),
    })
}

/// A tensor ready for analysis.
#[derive(Debug, Clone, PartialEq)]
pub struct Tensor {
    /// Name in its file, or a label the front end chose.
    pub name: String,
    /// The element type it was stored in (the baseline for size ratios).
    pub dtype: DType,
    /// Shape as stored.
    pub shape: Vec<usize>,
    /// Values in the 2-D view [rows = output channels, cols = input channels], row-major.
    pub values: Array2<f32>,
}

/// Where NaN and infinite values sit in a tensor.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct NonFiniteCount {
    /// Count of NaN values.
    pub nan: usize,
    /// Count of infinite values.
    pub inf: usize,
    /// (row, column) of the first one in row-major order.
    pub first: Option<(usize, usize)>,
}

impl NonFiniteCount {
    /// An error naming the count and the first place, when there is any NaN or infinite value.
    pub fn check(&self) -> Result<()> {
        match self.first {
            Some((first_row, first_col)) => Err(Error::NonFinite { nan: self.nan, inf: self.inf, first_row, first_col }),
            None => Ok(()),
        }
    }
}

impl Tensor {
    /// Wrap values already in the 2-D view; the stored shape is taken to be that view.
    pub fn from_values(name: impl Into<String>, dtype: DType, values: Array2<f32>) -> Self {
        // The kernels walk rows as contiguous slices.
        let values = if values.is_standard_layout() { values } else { values.as_standard_layout().into_owned() };
        let shape = values.shape().to_vec();
        Tensor { name: name.into(), dtype, shape, values }
    }

    /// Name a tensor that has no name of its own (an `.npy` array, a text matrix) after the file
    /// it was read from, without the extension, so that the command and the page show the same.
    pub fn name_after_file(&mut self, file_name: &str) {
        if self.name.is_empty() {
            self.name = std::path::Path::new(file_name).file_stem().map(|s| s.to_string_lossy().into_owned()).unwrap_or_default();
        }
    }

    /// Number of rows (output channels).
    pub fn rows(&self) -> usize {
        self.values.nrows()
    }

    /// Number of columns (input channels).
    pub fn cols(&self) -> usize {
        self.values.ncols()
    }

    /// The finite range and the NaN and infinite values, in one pass over the row blocks (on the
    /// pool where there is one), with lane min/max rather than `f32::min`/`max`: WebAssembly
    /// makes those a library call per value (225 ms for a 4096 × 14336 layer in the page).
    pub fn scan(&self) -> ValueScan {
        let cols = self.cols();
        let values = self.values.as_standard_layout();
        let all = values.as_slice().expect("standard layout");
        let blocks = rows::map_blocks(self.rows(), |r| ValueScan::of(&all[r.start * cols..r.end * cols], r.start, cols));
        blocks.into_iter().fold(ValueScan::default(), ValueScan::then)
    }
}

/// What one pass over a tensor's values finds.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct ValueScan {
    /// Smallest and largest finite value, or `None` when there is none.
    pub range: Option<(f32, f32)>,
    /// The NaN and infinite values.
    pub non_finite: NonFiniteCount,
}

impl ValueScan {
    /// The scan of whole rows `values` of `cols` columns, the first of them row `first_row`.
    fn of(values: &[f32], first_row: usize, cols: usize) -> Self {
        // Nearly every tensor is finite: one vector pass then gives the range, and a value at a
        // time is walked only where that pass finds a NaN or an infinity.
        let Some(&seed) = values.first() else { return ValueScan::default() };
        if let Some(range) = finite_extremes(values, seed) {
            return ValueScan { range: Some(range), non_finite: NonFiniteCount::default() };
        }
        let mut scan = ValueScan::default();
        for (i, &v) in values.iter().enumerate() {
            if v.is_finite() {
                scan.range = Some(scan.range.map_or((v, v), |(lo, hi)| (lo.min(v), hi.max(v))));
            } else {
                let count = &mut scan.non_finite;
                if v.is_nan() {
                    count.nan += 1;
                } else {
                    count.inf += 1;
                }
                count.first.get_or_insert((first_row + i / cols, i % cols));
            }
        }
        scan
    }

    /// This scan followed by the scan of the rows after it.
    fn then(self, next: ValueScan) -> ValueScan {
        let range = match (self.range, next.range) {
            (Some((lo, hi)), Some((l, h))) => Some((lo.min(l), hi.max(h))),
            (a, b) => a.or(b),
        };
        let (a, b) = (self.non_finite, next.non_finite);
        ValueScan { range, non_finite: NonFiniteCount { nan: a.nan + b.nan, inf: a.inf + b.inf, first: a.first.or(b.first) } }
    }
}

/// Order names so that "layer.2" comes before "layer.10".
pub fn natural_cmp(a: &str, b: &str) -> std::cmp::Ordering {
    use std::cmp::Ordering;
    let (mut a, mut b) = (a.as_bytes(), b.as_bytes());
    loop {
        match (a.first(), b.first()) {
            (None, None) => return Ordering::Equal,
            (None, Some(_)) => return Ordering::Less,
            (Some(_), None) => return Ordering::Greater,
            (Some(x), Some(y)) if x.is_ascii_digit() && y.is_ascii_digit() => {
                let da = a.iter().take_while(|c| c.is_ascii_digit()).count();
                let db = b.iter().take_while(|c| c.is_ascii_digit()).count();
                let (na, nb) = (trim_zeros(&a[..da]), trim_zeros(&b[..db]));
                let order = na.len().cmp(&nb.len()).then_with(|| na.cmp(nb));
                if order != Ordering::Equal {
                    return order;
                }
                a = &a[da..];
                b = &b[db..];
            }
            (Some(x), Some(y)) => {
                if x != y {
                    return x.cmp(y);
                }
                a = &a[1..];
                b = &b[1..];
            }
        }
    }
}

fn trim_zeros(digits: &[u8]) -> &[u8] {
    let zeros = digits.iter().take_while(|&&c| c == b'0').count();
    &digits[zeros..]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_array_without_a_name_takes_the_file_name_less_its_extension() {
        let named = |name: &str, file: &str| {
            let mut t = Tensor::from_values(name, DType::F32, Array2::zeros((1, 1)));
            t.name_after_file(file);
            t.name
        };
        assert_eq!(named("", "/data/block.7.up.npy"), "block.7.up");
        assert_eq!(named("", "weights.csv"), "weights");
        assert_eq!(named("", "plain"), "plain");
        assert_eq!(named("model.up.weight", "shard-1.safetensors"), "model.up.weight", "a tensor's own name stays");
    }

    /// A read in ranges, each decoded in blocks on the pool, gives the values of one whole read
    /// and of a decode element by element, for ranges and counts that do not divide each other
    /// or the decode block (which is also crossed), and for none at all.
    #[test]
    fn ranged_reads_match_one_decode_of_the_whole() {
        for dtype in [DType::F16, DType::BF16, DType::F32, DType::F64, DType::I8] {
            let element = Element::little(dtype);
            let size = dtype.size();
            for count in [0, 1, 7, DECODE_BLOCK_ELEMENTS + 3] {
                let bytes: Vec<u8> = (0..count * size).map(|i| (i * 37 % 251) as u8).collect();
                let want: Vec<f32> = bytes.chunks_exact(size).map(|raw| read_values(raw, 0, element, 1, 1).unwrap()[0]).collect();
                for chunk in [0, 3, 1001, usize::MAX / 16] {
                    let got = read_values(&bytes[..], 0, element, count, chunk).unwrap();
                    let same = got.iter().zip(&want).all(|(a, b)| a.to_bits() == b.to_bits());
                    assert!(got.len() == count && same, "{dtype}, {count} elements, ranges of {chunk} elements");
                }
            }
        }
    }

    #[test]
    fn views_follow_the_layer_convention() {
        assert_eq!(view_2d(&[]).unwrap(), (1, 1));
        assert_eq!(view_2d(&[7]).unwrap(), (1, 7));
        assert_eq!(view_2d(&[3, 5]).unwrap(), (3, 5));
        assert_eq!(view_2d(&[4, 3, 3, 2]).unwrap(), (4, 18));
        assert_eq!(view_2d(&[0, 5]).unwrap(), (0, 5));
        assert_eq!(view_2d(&[5, 0]).unwrap(), (5, 0));
        assert!(matches!(view_2d(&[usize::MAX, 3]), Err(Error::BadShape { .. })));
    }

    /// Shapes past the cap are refused with their size in the message; a shape that holds no
    /// element is refused too when its other axes pass the cap (they would size per-row arrays,
    /// and ndarray refuses non-zero axes whose product overflows isize).
    #[test]
    fn shapes_past_the_element_cap_are_refused_with_their_size() {
        let message = |shape: &[usize]| element_count(shape).unwrap_err().to_string();
        let over = MAX_ELEMENTS + 1;
        assert!(message(&[over]).contains(&format!("its {over} elements need")), "{}", message(&[over]));
        assert!(message(&[over]).contains(&format!("at most {MAX_ELEMENTS} elements")));
        assert!(message(&[over, 0]).contains(&format!("holds no elements, but its other axes span {over}")));
        assert!(message(&[0, 1 << 20, 1 << 20, 1 << 20]).contains("holds no elements"));
        assert!(message(&[1 << 40, 1 << 40, 0]).contains("overflows"));
        assert_eq!(element_count(&[MAX_ELEMENTS, 0]).unwrap(), 0);
        assert_eq!(element_count(&[3, 0, 5]).unwrap(), 0);
        assert_eq!(element_count(&[]).unwrap(), 1);
    }

    /// A source that claims a huge length and reads as zeros past a real header: the read is
    /// refused from the shape alone, before any buffer for the values exists.
    struct Claimed(Vec<u8>, u64);

    impl ByteSource for Claimed {
        fn len(&self) -> u64 {
            self.1
        }
        fn read_at(&self, offset: u64, buf: &mut [u8]) -> Result<()> {
            for (i, b) in buf.iter_mut().enumerate() {
                *b = usize::try_from(offset).ok().and_then(|o| self.0.get(o + i)).copied().unwrap_or(0);
            }
            Ok(())
        }
    }

    #[test]
    fn tensors_past_the_cap_list_but_refuse_to_load_before_allocating() {
        let elements = MAX_ELEMENTS as u64 * 2;
        let header = format!(r#"{{"big":{{"dtype":"F32","shape":[2,{}],"data_offsets":[0,{}]}}}}"#, elements / 2, elements * 4);
        let mut bytes = (header.len() as u64).to_le_bytes().to_vec();
        bytes.extend_from_slice(header.as_bytes());
        let src = Claimed(bytes, 8 + header.len() as u64 + elements * 4);
        let listing = list(&src, ReadOptions::default()).unwrap();
        let message = read(&src, listing.choose(None).unwrap()).unwrap_err().to_string();
        assert!(message.contains(&format!("its {elements} elements need")), "{message}");
    }

    #[test]
    fn names_in_messages_stay_on_one_line() {
        let listing = Listing { kind: FileKind::Safetensors, entries: vec![] };
        let message = listing.choose(Some("a\nb")).unwrap_err().to_string();
        assert!(!message.contains('\n') && message.contains("a\\nb"), "{message}");
    }

    #[test]
    fn natural_order_reads_numbers_as_numbers() {
        let mut names = vec!["b.10", "b.2", "a", "b.01x", "b.1"];
        names.sort_by(|a, b| natural_cmp(a, b));
        assert_eq!(names, vec!["a", "b.1", "b.01x", "b.2", "b.10"]);
    }

    #[test]
    fn non_finite_values_are_counted_and_located() {
        let values = Array2::from_shape_vec((2, 3), vec![1.0, 2.0, 3.0, f32::NAN, f32::INFINITY, f32::NAN]).unwrap();
        let t = Tensor::from_values("t", DType::F32, values);
        let scan = t.scan();
        let count = scan.non_finite;
        assert_eq!((count.nan, count.inf, count.first), (2, 1, Some((1, 0))));
        assert_eq!(scan.range, Some((1.0, 3.0)));
    }

    /// The block-wise scan against a plain pass over every value, over shapes with 0 rows, one
    /// row, rows that are not a multiple of the block, and non-finite values in a late block.
    #[test]
    fn the_scan_matches_a_plain_pass() {
        let mut rng = crate::demo::Rng::new(7);
        for (rows, cols, bad) in [(0, 5, vec![]), (1, 1, vec![]), (1, 9, vec![]), (65, 3, vec![]), (130, 7, vec![(129, 6, f32::NAN)]), (200, 5, vec![(70, 1, f32::NEG_INFINITY), (3, 4, f32::INFINITY), (199, 0, f32::NAN)]), (64, 1, vec![(0, 0, f32::NAN)])] {
            let mut values = Array2::from_shape_fn((rows, cols), |_| rng.normal() as f32 * 3.0 - 0.5);
            for &(r, c, v) in &bad {
                values[[r, c]] = v;
            }
            let scan = Tensor::from_values("t", DType::F32, values.clone()).scan();
            let finite: Vec<f32> = values.iter().copied().filter(|v| v.is_finite()).collect();
            let range = (!finite.is_empty()).then(|| finite.iter().fold((f32::INFINITY, f32::NEG_INFINITY), |(lo, hi), &v| (lo.min(v), hi.max(v))));
            let first = values.indexed_iter().find(|(_, v)| !v.is_finite()).map(|(at, _)| at);
            let nan = values.iter().filter(|v| v.is_nan()).count();
            let inf = values.iter().filter(|v| v.is_infinite()).count();
            assert_eq!(scan, ValueScan { range, non_finite: NonFiniteCount { nan, inf, first } }, "{rows} × {cols}");
        }
    }

    #[test]
    fn slices_refuse_reads_past_their_end() {
        let bytes = [1u8, 2, 3];
        let src = &bytes[..];
        assert!(matches!(read_range(src, 2, 2, "x"), Err(Error::Truncated { needed: 4, available: 3, .. })));
        assert_eq!(read_range(src, 1, 2, "x").unwrap(), vec![2, 3]);
    }
}
