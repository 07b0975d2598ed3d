//! The quantized form as a `.safetensors` file in a layout of our own (`bitloupe.packed/1`),
//! and reading it back. The layout is documented byte by byte in README.md.
//!
//! Tensors (all little-endian; bit streams are least-significant bit first, element by element
//! in row-major order):
//! * `codes` U8: one b-bit code per element. Integer grids store q − qmin; NF4 and codebooks the
//!   level's index; small floats and MX elements their OCP encoding (sign bit, then the index of
//!   the magnitude among the format's values, which equals the exponent/mantissa bits); MXINT8
//!   the two's-complement byte;
//! * `scales` F16 | BF16 | F32 (or U8 E8M0 exponents, 2^(e − 127)): one per group, row-major;
//!   NF4 with double quantization stores instead `scale_codes` I8, `scale_steps` F32 (one per 256)
//!   and `scale_mean` F32;
//! * `zeros` U8 bit stream of b-bit zero points (asymmetric integer grids), or the scale type
//!   (HQQ's real zero points);
//! * `codebook` F16 [groups, 2^b] (codebooks);
//! * `kept_columns` or `kept_index` U32 and `kept_values` F16 (kept columns: all rows of the
//!   first kept column, then the next);
//! * `column_factors` F32 \[cols\] (smoothing, AWQ): the grid saw W·diag(s), so Ŵ = Q(·)/s_j.
//!
//! Metadata: `bitloupe.packed` = "1", `recipe` (JSON), `shape` (JSON of the source shape).
//!
//! Packing checks itself: it reads back the bytes it is about to return and refuses unless they
//! decode to the analysis's Ŵ bit for bit.

use crate::analysis::Analysis;
use crate::error::{Error, Result};
use crate::formats::{DoubleQuantized, Format, NF4_LEVELS};
use crate::grid::{GroupParams, IntGrid};
use crate::methods::group_width;
use crate::recipe::{Granularity, Method, Recipe, ScaleDType};
use crate::tensor::safetensors::{read_header, read_metadata, write, Outgoing};
use crate::tensor::{decode_little_endian, read_range, view_2d, ByteSource, DType, Tensor};
use half::{bf16, f16};
use ndarray::Array2;
use std::collections::BTreeMap;

/// The layout's identifier in the metadata.
pub const LAYOUT: &str = "1";

fn bad(detail: impl Into<String>) -> Error {
    Error::BadFormat { format: "bitloupe packed", detail: detail.into() }
}

/// How a code maps to a value before scaling, for one recipe.
struct Codec {
    recipe: Recipe,
    bits: u32,
    values: Vec<f32>,
    /// For small floats: how many magnitudes the format has (the rest of each half is unused).
    magnitudes: usize,
    /// For integer grids: the smallest code.
    qmin: f32,
}

impl Codec {
    fn new(recipe: &Recipe) -> Self {
        let bits = recipe.format.element_bits(recipe.bits);
        let magnitudes = recipe.format.element().map_or(0, |e| e.positive_values().len());
        let values = match recipe.format {
            Format::Int | Format::Codebook => Vec::new(),
            Format::Nf4 => NF4_LEVELS.to_vec(),
            Format::Mxint8 => (0..256u32).map(|c| f32::from(c as u8 as i8) / 64.0).collect(),
            f => {
                let magnitudes = f.element().expect("a small float").positive_values();
                let half = 1usize << (bits - 1);
                (0..2 * half).map(|c| if c < half { magnitudes.get(c).copied().unwrap_or(0.0) } else { -magnitudes.get(c - half).copied().unwrap_or(0.0) }).collect()
            }
        };
        let qmin = if recipe.format == Format::Int { IntGrid::new(recipe).qmin } else { 0.0 };
        Codec { recipe: *recipe, bits, values, magnitudes, qmin }
    }

    /// The value of `code` in a group with parameters `p` (or levels `book`), computed exactly
    /// as the quantizers compute it.
    fn decode(&self, code: u32, p: GroupParams, book: &[f32]) -> f32 {
        match self.recipe.format {
            Format::Int => (code as f32 + self.qmin - p.zero) * p.scale,
            Format::Codebook => book[code as usize],
            _ => self.values[code as usize] * p.scale,
        }
    }

    /// The code nearest to the value `v` of a group, and its neighbours.
    fn candidates(&self, v: f32, p: GroupParams, book: &[f32]) -> [u32; 3] {
        let (index, offset) = match self.recipe.format {
            Format::Int => (((v / p.scale + p.zero).round() - self.qmin).max(0.0) as usize, 0),
            Format::Codebook => (book.partition_point(|&l| l < v), 0),
            Format::Nf4 => (NF4_LEVELS.partition_point(|&l| l < v / p.scale), 0),
            Format::Mxint8 => (((v / p.scale * 64.0).round().clamp(-128.0, 127.0) as i8 as u8) as usize, 0),
            _ => {
                // Sign bit, then the magnitude's index among the format's ascending values.
                let half = 1usize << (self.bits - 1);
                let u = (v / p.scale).abs();
                let index = self.values[..self.magnitudes].partition_point(|&m| m < u);
                (index, if v.is_sign_negative() { half } else { 0 })
            }
        };
        let code = (index + offset) as u32;
        [code, code.wrapping_sub(1), code + 1]
    }
}

fn push_bits(stream: &mut Vec<u8>, used: &mut usize, value: u32, bits: u32) {
    for i in 0..bits {
        if used.is_multiple_of(8) {
            stream.push(0);
        }
        if value >> i & 1 == 1 {
            *stream.last_mut().expect("pushed") |= 1 << (*used % 8);
        }
        *used += 1;
    }
}

fn read_bits(stream: &[u8], at: &mut usize, bits: u32) -> Result<u32> {
    let mut value = 0;
    for i in 0..bits {
        let byte = stream.get(*at / 8).ok_or_else(|| bad("the code stream is too short"))?;
        value |= u32::from(byte >> (*at % 8) & 1) << i;
        *at += 1;
    }
    Ok(value)
}

/// The safetensors dtype that values stored as `dtype` are declared with.
fn scale_label(dtype: ScaleDType) -> &'static str {
    match dtype {
        ScaleDType::F16 => "F16",
        ScaleDType::BF16 => "BF16",
        ScaleDType::F32 => "F32",
        ScaleDType::E8M0 => "U8",
    }
}

fn scale_bytes(dtype: ScaleDType, values: &[f32]) -> (&'static str, Vec<u8>) {
    let bytes = match dtype {
        ScaleDType::F16 => values.iter().flat_map(|v| f16::from_f32(*v).to_le_bytes()).collect(),
        ScaleDType::BF16 => values.iter().flat_map(|v| bf16::from_f32(*v).to_le_bytes()).collect(),
        ScaleDType::F32 => values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        ScaleDType::E8M0 => values.iter().map(|v| (v.log2().round() as i32 + 127).clamp(0, 254) as u8).collect(),
    };
    (scale_label(dtype), bytes)
}

fn scale_values(dtype: ScaleDType, bytes: &[u8]) -> Vec<f32> {
    match dtype {
        ScaleDType::F16 => decode_little_endian(DType::F16, bytes),
        ScaleDType::BF16 => decode_little_endian(DType::BF16, bytes),
        ScaleDType::F32 => decode_little_endian(DType::F32, bytes),
        ScaleDType::E8M0 => bytes.iter().map(|&e| 2f64.powi(i32::from(e) - 127) as f32).collect(),
    }
}

fn f32_bytes(values: &[f32]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

fn u32_bytes(values: impl Iterator<Item = usize>) -> Vec<u8> {
    values.flat_map(|v| (v as u32).to_le_bytes()).collect()
}

/// The parameters of the group that holds (row, col).
fn params_at(params: &[GroupParams], recipe: &Recipe, per_row: usize, width: usize, r: usize, c: usize) -> GroupParams {
    match recipe.granularity {
        Granularity::Tensor => params[0],
        _ => params[r * per_row + c / width],
    }
}

/// The codebook of row `r` (empty for formats without one).
fn book_of<'a>(recipe: &Recipe, codebooks: &'a [Vec<f32>], r: usize) -> &'a [f32] {
    match recipe.granularity {
        _ if recipe.format != Format::Codebook => &[],
        Granularity::Tensor => &codebooks[0],
        _ => &codebooks[r],
    }
}

/// Where the kept values sit, in the order the file stores them: whole kept columns first (each
/// from row 0 down), then the single kept elements (row-major indices).
fn kept_positions(columns: &[usize], elements: &[usize], rows: usize, cols: usize) -> Vec<(usize, usize)> {
    columns.iter().flat_map(|&c| (0..rows).map(move |r| (r, c))).chain(elements.iter().map(|&i| (i / cols, i % cols))).collect()
}

/// The packed `.safetensors` bytes of `analysis`, taken from `tensor`.
pub fn pack(analysis: &Analysis, tensor: &Tensor) -> Result<Vec<u8>> {
    let dequantized = analysis.dequantized(tensor)?;
    pack_reconstruction(analysis, &tensor.shape, &dequantized)
}

/// [`pack`] from the reconstruction `dequantized` of the analysed tensor (of `shape`), for a
/// caller that also writes the reconstruction itself and so makes it once.
pub fn pack_reconstruction(analysis: &Analysis, shape: &[usize], dequantized: &Array2<f32>) -> Result<Vec<u8>> {
    if dequantized.dim() != analysis.dim() || view_2d(shape)? != analysis.dim() {
        return Err(Error::NotTheAnalysedTensor { shape: shape.to_vec() });
    }
    let recipe = analysis.recipe;
    let (rows, cols) = dequantized.dim();
    let codec = Codec::new(&recipe);
    let width = group_width(recipe.granularity, cols);
    let per_row = recipe.granularity.groups_per_row(cols);
    let kept = &analysis.kept;
    let kept_positions = kept_positions(&kept.columns, &kept.elements, rows, cols);
    let kept_values: Vec<f32> = kept_positions.iter().map(|&(r, c)| dequantized[[r, c]]).collect();
    if kept_values.iter().any(|v| f16::from_f32(*v).to_f32().to_bits() != v.to_bits()) {
        return Err(Error::BadRecipe { detail: "a kept value is not an f16 value here (GPTQ with smoothing), so this result cannot be packed exactly".into() });
    }
    let kept_set: std::collections::HashSet<(usize, usize)> = kept_positions.iter().copied().collect();
    let mut codes = Vec::new();
    let mut used = 0;
    for r in 0..rows {
        let book = book_of(&recipe, &analysis.codebooks, r);
        for c in 0..cols {
            let code = if kept_set.contains(&(r, c)) {
                0
            } else {
                let p = if recipe.format == Format::Codebook { GroupParams { scale: 1.0, zero: 0.0 } } else { params_at(&analysis.params, &recipe, per_row, width, r, c) };
                let v = dequantized[[r, c]];
                // With column factors Ŵ = Q(w·s)/s: look for the code near v·s that divides back to v.
                let factor = analysis.column_factors.as_ref().map_or(1.0, |s| s[c]);
                let limit = 1u32 << codec.bits;
                let reproduces = |code: &u32| {
                    *code < limit
                        && (recipe.format != Format::Codebook || (*code as usize) < book.len())
                        && (codec.decode(*code, p, book) / factor).to_bits() == v.to_bits()
                };
                codec
                    .candidates(v * factor, p, book)
                    .into_iter()
                    .find(reproduces)
                    .ok_or_else(|| bad(format!("no code reproduces the value at row {r}, column {c}")))?
            };
            push_bits(&mut codes, &mut used, code, codec.bits);
        }
    }

    let mut tensors = vec![Outgoing { name: "codes", dtype: "U8", shape: vec![codes.len()], data: codes }];
    let scales: Vec<f32> = analysis.params.iter().map(|p| p.scale).collect();
    match (&analysis.double_quant, recipe.format) {
        (_, Format::Codebook) => {
            let levels: Vec<f32> = analysis.codebooks.iter().flat_map(|b| {
                let mut padded = b.clone();
                padded.resize(1 << recipe.bits, *b.last().unwrap_or(&0.0));
                padded
            }).collect();
            let (dtype, data) = scale_bytes(ScaleDType::F16, &levels);
            tensors.push(Outgoing { name: "codebook", dtype, shape: vec![analysis.codebooks.len(), 1 << recipe.bits], data });
        }
        (Some(dq), _) => {
            tensors.push(Outgoing { name: "scale_codes", dtype: "I8", shape: vec![dq.codes.len()], data: dq.codes.iter().map(|&c| c as u8).collect() });
            tensors.push(Outgoing { name: "scale_steps", dtype: "F32", shape: vec![dq.steps.len()], data: f32_bytes(&dq.steps) });
            tensors.push(Outgoing { name: "scale_mean", dtype: "F32", shape: vec![1], data: f32_bytes(&[dq.mean]) });
        }
        (None, _) => {
            let (dtype, data) = scale_bytes(recipe.scale_dtype, &scales);
            tensors.push(Outgoing { name: "scales", dtype, shape: vec![scales.len()], data });
        }
    }
    if recipe.format == Format::Int && !recipe.symmetric {
        let zeros: Vec<f32> = analysis.params.iter().map(|p| p.zero).collect();
        if recipe.method == Method::Hqq {
            let (dtype, data) = scale_bytes(recipe.scale_dtype, &zeros);
            tensors.push(Outgoing { name: "zeros", dtype, shape: vec![zeros.len()], data });
        } else {
            let (mut stream, mut used) = (Vec::new(), 0);
            for z in &zeros {
                push_bits(&mut stream, &mut used, *z as u32, codec.bits);
            }
            tensors.push(Outgoing { name: "zeros", dtype: "U8", shape: vec![stream.len()], data: stream });
        }
    }
    if !kept.columns.is_empty() {
        tensors.push(Outgoing { name: "kept_columns", dtype: "U32", shape: vec![kept.columns.len()], data: u32_bytes(kept.columns.iter().copied()) });
    }
    if !kept.elements.is_empty() {
        tensors.push(Outgoing { name: "kept_index", dtype: "U32", shape: vec![kept.elements.len()], data: u32_bytes(kept.elements.iter().copied()) });
    }
    if !kept_values.is_empty() {
        let (dtype, data) = scale_bytes(ScaleDType::F16, &kept_values);
        tensors.push(Outgoing { name: "kept_values", dtype, shape: vec![kept_values.len()], data });
    }
    if let Some(s) = &analysis.column_factors {
        tensors.push(Outgoing { name: "column_factors", dtype: "F32", shape: vec![s.len()], data: f32_bytes(s) });
    }

    let mut metadata = BTreeMap::new();
    metadata.insert("bitloupe.packed".to_string(), LAYOUT.to_string());
    metadata.insert("recipe".to_string(), serde_json::to_string(&recipe).expect("plain data"));
    metadata.insert("shape".to_string(), serde_json::to_string(shape).expect("plain data"));
    let bytes = write(&tensors, &metadata);
    // Check the bytes themselves, read back as any reader would: scales stored in a narrower
    // type, a bit stream or the metadata could otherwise differ from the analysis unnoticed.
    let (_, decoded) = unpack(&bytes[..]).map_err(|e| {
        let why = match e {
            Error::BadFormat { detail, .. } => detail,
            other => other.to_string(),
        };
        bad(format!("the packed form does not read back ({why}); nothing was written"))
    })?;
    if decoded.iter().zip(dequantized.iter()).any(|(a, b)| a.to_bits() != b.to_bits()) {
        return Err(bad("the packed form would not reproduce the dequantized tensor exactly; nothing was written"));
    }
    Ok(bytes)
}

/// Read a packed file back: the source shape and the dequantized tensor in its 2-D view.
pub fn unpack<S: ByteSource + ?Sized>(src: &S) -> Result<(Vec<usize>, Array2<f32>)> {
    let metadata = read_metadata(src)?;
    if metadata.get("bitloupe.packed").map(String::as_str) != Some(LAYOUT) {
        return Err(bad("the file has no bitloupe.packed/1 metadata"));
    }
    let recipe = Recipe::from_json(metadata.get("recipe").ok_or_else(|| bad("no recipe in the metadata"))?)
        .map_err(|e| bad(format!("the recipe in the metadata is not valid ({e})")))?;
    recipe.validate()?;
    let shape: Vec<usize> = serde_json::from_str(metadata.get("shape").ok_or_else(|| bad("no shape in the metadata"))?)
        .map_err(|e| bad(format!("the shape in the metadata is not valid ({e})")))?;
    let (rows, cols) = crate::tensor::view_2d(&shape)?;
    // Packing needs an analysis, which refuses an empty tensor; an empty shape here could only
    // size per-row arrays from a dimension that no data bounds.
    if rows * cols == 0 {
        return Err(bad(format!("the shape {shape:?} holds no elements")));
    }
    let entries = read_header(src)?;
    // Each part must be declared with the type the layout stores it in: bytes of another type
    // would be read as something they are not.
    let raw = |name: &str, dtype: &str| -> Result<Option<Vec<u8>>> {
        match entries.iter().find(|e| e.name == name) {
            Some(e) if e.dtype_label != dtype => {
                Err(bad(format!("the '{name}' tensor is declared as {}, but this layout stores it as {dtype}", e.dtype_label)))
            }
            Some(e) => Ok(Some(read_range(src, e.offset, e.bytes, "packed tensor")?)),
            None => Ok(None),
        }
    };
    let missing = |name: &str| bad(format!("the '{name}' tensor is missing"));
    let need = |name: &str, dtype: &str| -> Result<Vec<u8>> { raw(name, dtype)?.ok_or_else(|| missing(name)) };
    let maybe_floats = |name: &str, dtype: ScaleDType| -> Result<Option<Vec<f32>>> {
        Ok(raw(name, scale_label(dtype))?.map(|b| scale_values(dtype, &b)))
    };
    let floats = |name: &str, dtype: ScaleDType| -> Result<Vec<f32>> { maybe_floats(name, dtype)?.ok_or_else(|| missing(name)) };
    let groups = recipe.granularity.group_count(rows, cols);
    let codes = need("codes", "U8")?;
    // rows × cols ≤ MAX_ELEMENTS (view_2d), at most 8 bits each: within 64 bits, and checked
    // for 32-bit wasm.
    let expected_code_bytes = (rows * cols).checked_mul(Codec::new(&recipe).bits as usize).ok_or_else(|| bad("the code count overflows"))?.div_ceil(8);
    if codes.len() != expected_code_bytes {
        return Err(bad(format!("'codes' holds {} bytes but {rows}×{cols} codes need {expected_code_bytes}", codes.len())));
    }
    let mut codebooks = Vec::new();
    let mut scales = vec![1.0f32; groups];
    if recipe.format == Format::Codebook {
        let levels = floats("codebook", ScaleDType::F16)?;
        let per = 1usize << recipe.bits;
        if Some(levels.len()) != per.checked_mul(groups) {
            return Err(bad("the codebook does not match the recipe"));
        }
        codebooks = levels.chunks(per).map(<[f32]>::to_vec).collect();
    } else if recipe.double_quant {
        let dq = DoubleQuantized {
            codes: need("scale_codes", "I8")?.into_iter().map(|b| b as i8).collect(),
            steps: floats("scale_steps", ScaleDType::F32)?,
            mean: *floats("scale_mean", ScaleDType::F32)?.first().ok_or_else(|| bad("empty scale mean"))?,
        };
        if dq.codes.len() != groups || dq.steps.len() != groups.div_ceil(crate::cost::DOUBLE_QUANT_BLOCK as usize) {
            return Err(bad("the double-quantized scales do not match the recipe"));
        }
        scales = dq.scales();
    } else {
        scales = floats("scales", recipe.scale_dtype)?;
    }
    if scales.len() != groups.max(1) && recipe.format != Format::Codebook {
        return Err(bad(format!("{} scales for {groups} groups", scales.len())));
    }
    let zeros: Vec<f32> = match (recipe.format, recipe.symmetric, recipe.method) {
        (Format::Int, false, Method::Hqq) => floats("zeros", recipe.scale_dtype)?,
        (Format::Int, false, _) => {
            let stream = need("zeros", "U8")?;
            let bits = u32::from(recipe.bits);
            let mut at = 0;
            (0..groups).map(|_| read_bits(&stream, &mut at, bits).map(|z| z as f32)).collect::<Result<_>>()?
        }
        _ => vec![0.0; groups],
    };
    if zeros.len() != groups {
        return Err(bad(format!("{} zero points for {groups} groups", zeros.len())));
    }
    let params: Vec<GroupParams> = scales.iter().zip(&zeros).map(|(&scale, &zero)| GroupParams { scale, zero }).collect();
    let u32s = |bytes: Vec<u8>| -> Vec<usize> { bytes.chunks_exact(4).map(|b| u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as usize).collect() };
    let kept_columns = raw("kept_columns", "U32")?.map(u32s).unwrap_or_default();
    let kept_index = raw("kept_index", "U32")?.map(u32s).unwrap_or_default();
    if kept_columns.iter().any(|&c| c >= cols) || kept_index.iter().any(|&i| i >= rows * cols) {
        return Err(bad("a kept index lies outside the tensor"));
    }
    let kept_values = maybe_floats("kept_values", ScaleDType::F16)?.unwrap_or_default();
    // Counted before the positions are listed: a few kept columns repeated many times over a
    // tall tensor would otherwise list far more positions than the file holds values.
    let kept_count = kept_columns.len().checked_mul(rows).and_then(|n| n.checked_add(kept_index.len()));
    if kept_count != Some(kept_values.len()) {
        return Err(bad("kept values and their positions differ in number"));
    }
    let kept_positions = kept_positions(&kept_columns, &kept_index, rows, cols);
    let column_factors = maybe_floats("column_factors", ScaleDType::F32)?;
    if column_factors.as_ref().is_some_and(|s| s.len() != cols) {
        return Err(bad("column factors do not match the columns"));
    }
    let codec = Codec::new(&recipe);
    let width = group_width(recipe.granularity, cols);
    let per_row = recipe.granularity.groups_per_row(cols);
    let mut out = Array2::<f32>::zeros((rows, cols));
    let mut at = 0;
    for r in 0..rows {
        let book = book_of(&recipe, &codebooks, r);
        for c in 0..cols {
            let code = read_bits(&codes, &mut at, codec.bits)?;
            let p = if recipe.format == Format::Codebook { GroupParams { scale: 1.0, zero: 0.0 } } else { params_at(&params, &recipe, per_row, width, r, c) };
            if recipe.format == Format::Codebook && code as usize >= book.len() {
                return Err(bad("a code points past its codebook"));
            }
            let mut v = codec.decode(code, p, book);
            if let Some(s) = &column_factors {
                v /= s[c];
            }
            out[[r, c]] = v;
        }
    }
    for (&(r, c), &v) in kept_positions.iter().zip(&kept_values) {
        out[[r, c]] = v;
    }
    // Our writer stores finite scales, zero points and non-zero factors only, so anything else
    // (an infinite scale, a factor of 0) is damage, not a tensor to hand on.
    if let Some(((r, c), _)) = out.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(bad(format!("the stored scales, zero points or factors give a value that is not finite at row {r}, column {c}")));
    }
    Ok((shape, out))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::{analyze, analyze_with};
    use crate::calib::Calibration;
    use crate::demo::Rng;
    use crate::tensor::{DType, Tensor};

    fn tensor(rows: usize, cols: usize, seed: u64) -> Tensor {
        let mut rng = Rng::new(seed);
        let mut values = Array2::from_shape_fn((rows, cols), |_| (rng.normal() * (0.5 * rng.normal()).exp() * 0.05) as f32);
        values.column_mut(3).mapv_inplace(|v| v * 9.0);
        Tensor::from_values("w", DType::F32, values)
    }

    /// The packed file unpacks to exactly the dequantized tensor, for every format, method and
    /// outlier treatment, on shapes that are not multiples of the group size; its size is the
    /// reported bit cost plus at most its header and one byte of rounding per part.
    #[test]
    fn packed_files_round_trip_exactly_and_cost_what_the_report_says() {
        let t = tensor(7, 200, 3);
        let mut rng = Rng::new(8);
        let x = Array2::from_shape_fn((64, 200), |_| rng.normal() as f32);
        let calib = Calibration::from_sample(x);
        let g = |n| Granularity::Group(n);
        let recipes = [
            Recipe::default(),
            Recipe { bits: 3, symmetric: true, granularity: g(64), scale_dtype: ScaleDType::BF16, ..Recipe::default() },
            Recipe { bits: 8, granularity: Granularity::Row, scale_dtype: ScaleDType::F32, ..Recipe::default() },
            Recipe { bits: 2, granularity: Granularity::Tensor, ..Recipe::default() },
            Recipe { method: Method::Hqq, bits: 3, granularity: g(32), ..Recipe::default() },
            Recipe { method: Method::Clip, keep_frac: 0.02, ..Recipe::default() },
            Recipe { keep_cols: 2, granularity: g(16), ..Recipe::default() },
            Recipe { method: Method::Gptq, granularity: g(32), ..Recipe::default() },
            Recipe { method: Method::Awq, bits: 3, granularity: g(64), ..Recipe::default() },
            Recipe { smooth: Some(0.5), ..Recipe::default() },
            Recipe::for_format(Format::Nf4),
            Recipe { double_quant: true, ..Recipe::for_format(Format::Nf4) },
            Recipe::for_format(Format::E2m1),
            Recipe { keep_frac: 0.01, ..Recipe::for_format(Format::E4m3) },
            Recipe::for_format(Format::E5m2),
            Recipe::for_format(Format::Mxfp4),
            Recipe::for_format(Format::Mxfp6e3m2),
            Recipe::for_format(Format::Mxint8),
            Recipe { bits: 3, ..Recipe::for_format(Format::Codebook) },
            Recipe { bits: 2, granularity: Granularity::Tensor, ..Recipe::for_format(Format::Codebook) },
        ];
        for recipe in recipes {
            let a = analyze_with(&t, &recipe, Some(&calib), &mut |_, _| {}).unwrap();
            let bytes = pack(&a, &t).unwrap_or_else(|e| panic!("{}: {e}", recipe.label()));
            let (shape, back) = unpack(&bytes[..]).unwrap();
            assert_eq!(shape, t.shape);
            assert!(back.iter().zip(a.dequantized(&t).unwrap().iter()).all(|(x, y)| x.to_bits() == y.to_bits()), "{} does not round-trip bit for bit", recipe.label());
            let header = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize + 8;
            let data = bytes.len() - header;
            let parts = 9; // at most one byte of rounding per stored part
            assert!(data as u64 >= a.cost.bytes.saturating_sub(parts) && data as u64 <= a.cost.bytes + parts, "{}: {data} data bytes for a cost of {} bytes", recipe.label(), a.cost.bytes);
        }
    }

    #[test]
    fn damaged_packed_files_are_refused() {
        let t = tensor(3, 64, 1);
        let a = analyze(&t, &Recipe { granularity: Granularity::Group(32), ..Recipe::default() }).unwrap();
        let bytes = pack(&a, &t).unwrap();
        let x_hat = a.dequantized(&t).unwrap();
        assert_eq!(pack_reconstruction(&a, &t.shape, &x_hat).unwrap(), bytes, "the same bytes from a reconstruction made once");
        let other = tensor(3, 32, 1).values;
        assert!(matches!(pack_reconstruction(&a, &t.shape, &other), Err(Error::NotTheAnalysedTensor { .. })), "a reconstruction of another shape");
        assert!(matches!(pack_reconstruction(&a, &[3, 32], &x_hat), Err(Error::NotTheAnalysedTensor { .. })), "another shape");
        assert!(unpack(&bytes[..bytes.len() - 5]).is_err());
        let plain = crate::tensor::npy::write_f32(&[1.0, 2.0], &[2]);
        assert!(unpack(&plain[..]).is_err());
        let not_ours = write(&[Outgoing { name: "w", dtype: "F32", shape: vec![1], data: 1f32.to_le_bytes().to_vec() }], &BTreeMap::new());
        assert!(unpack(&not_ours[..]).unwrap_err().to_string().contains("bitloupe.packed"));
    }

    /// A packed file of `recipe` for `shape` holding the given tensors (a hostile writer's).
    fn forged(recipe: &Recipe, shape: &str, tensors: &[Outgoing]) -> Vec<u8> {
        let metadata = BTreeMap::from([
            ("bitloupe.packed".to_string(), LAYOUT.to_string()),
            ("recipe".to_string(), serde_json::to_string(recipe).unwrap()),
            ("shape".to_string(), shape.to_string()),
        ]);
        write(tensors, &metadata)
    }

    #[test]
    fn forged_packed_files_are_refused_before_allocating() {
        let row = Recipe { granularity: Granularity::Row, symmetric: true, ..Recipe::default() };
        // No elements, but a row count that would size a scale array of 2^32 entries.
        let empty = forged(&row, "[4294967296, 0]", &[Outgoing { name: "codes", dtype: "U8", shape: vec![0], data: vec![] }]);
        assert!(unpack(&empty[..]).unwrap_err().to_string().contains("holds no elements"));
        // One kept column listed a thousand times over a tall tensor: 10^8 positions for no
        // stored value; refused from the counts.
        let rows = 100_000;
        let kept = Recipe { keep_cols: 1, ..row };
        let tall = forged(
            &kept,
            &format!("[{rows}, 2]"),
            &[
                Outgoing { name: "codes", dtype: "U8", shape: vec![rows], data: vec![0; rows] },
                Outgoing { name: "scales", dtype: "F16", shape: vec![rows], data: vec![0; 2 * rows] },
                Outgoing { name: "kept_columns", dtype: "U32", shape: vec![1000], data: vec![0; 4000] },
            ],
        );
        assert!(unpack(&tall[..]).unwrap_err().to_string().contains("differ in number"));
        // An infinite scale (f16 0x7c00) in the second row, and a column factor of 0.
        let codes = || Outgoing { name: "codes", dtype: "U8", shape: vec![2], data: vec![0x11, 0x11] };
        let scales = |second: u16| Outgoing { name: "scales", dtype: "F16", shape: vec![2], data: [0x3c00u16, second].iter().flat_map(|h| h.to_le_bytes()).collect() };
        let infinite = forged(&row, "[2, 2]", &[codes(), scales(0x7c00)]);
        assert!(unpack(&infinite[..]).unwrap_err().to_string().contains("not finite at row 1, column 0"));
        let factors = Outgoing { name: "column_factors", dtype: "F32", shape: vec![2], data: [1f32, 0.0].iter().flat_map(|f| f.to_le_bytes()).collect() };
        let zero_factor = forged(&Recipe { smooth: Some(0.5), ..row }, "[2, 2]", &[codes(), scales(0x3c00), factors]);
        assert!(unpack(&zero_factor[..]).unwrap_err().to_string().contains("not finite at row 0, column 1"));
        assert!(unpack(&forged(&row, "[2, 2]", &[codes(), scales(0x3c00)])[..]).is_ok());
        // The same two f16 scales declared as bf16: the recipe says f16, so the bytes would be
        // read as the wrong type.
        let mut as_bf16 = scales(0x3c00);
        as_bf16.dtype = "BF16";
        let mistyped = forged(&row, "[2, 2]", &[codes(), as_bf16]);
        assert!(unpack(&mistyped[..]).unwrap_err().to_string().contains("'scales' tensor is declared as BF16, but this layout stores it as F16"));
    }
}
