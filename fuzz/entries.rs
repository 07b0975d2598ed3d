//! The bodies of the fuzz targets, one function per target. The fuzz binaries
//! (`fuzz/fuzz_targets/*.rs`) and the stable-Rust test `tests/fuzz_regressions.rs` include this
//! one file, so every input that ever failed is replayed by `cargo test` through exactly the
//! code the fuzzer ran.
//!
//! Each body hands arbitrary bytes to one front door of the core, the way the page and the
//! command line call it, and checks what must hold for any input (README, "Bad inputs"): no
//! panic, no hang, and either a result that agrees with itself or an error whose message is
//! one line of text.

// Each fuzz binary calls one of these functions and leaves the others unused.
#![allow(dead_code)]

use bitloupe::calib::{CalibKind, Calibration};
use bitloupe::formats::Format;
use bitloupe::recipe::Method;
use bitloupe::tensor::{self, npy, safetensors, text, ByteSource, DType, ReadOptions, TensorEntry};
use bitloupe::{analyze_with, packed, Granularity, Recipe, ScaleDType, Tensor};
use ndarray::Array2;
use std::sync::OnceLock;

/// The outcome of a call: its value, or `None` after checking that the error reads as one line
/// (the command line prints it as one line on stderr, the page in one message box).
fn refused<T>(outcome: bitloupe::Result<T>) -> Option<T> {
    match outcome {
        Ok(value) => Some(value),
        Err(error) => {
            let message = error.to_string();
            assert!(!message.trim().is_empty(), "an empty error message for {error:?}");
            assert!(!message.contains(['\n', '\r']), "the message is not one line: {message:?}");
            None
        }
    }
}

/// Read one listed tensor and check that it holds exactly the elements its shape promises.
fn read_listed<S: ByteSource + ?Sized>(src: &S, entry: &TensorEntry) -> Option<Tensor> {
    let tensor = refused(tensor::read(src, entry))?;
    let count = tensor::element_count(&entry.shape).expect("a shape that was read has a count");
    assert_eq!(tensor.values.len(), count, "values of {:?}", entry.shape);
    assert_eq!(tensor.shape, entry.shape);
    Some(tensor)
}

/// `.npy`: the header parser, then the data read, with and without the bf16 reading of raw
/// 2-byte values.
pub fn npy(data: &[u8]) {
    for options in [ReadOptions::default(), ReadOptions { raw16_as_bf16: true }] {
        if let Some(entry) = refused(npy::read_header(data, options)) {
            assert!(entry.offset.checked_add(entry.bytes).is_some_and(|end| end <= data.len() as u64), "{entry:?} leaves the file");
            read_listed(data, &entry);
        }
    }
}

/// `.safetensors`: the header and its metadata, then every listed tensor's own byte range.
pub fn safetensors(data: &[u8]) {
    refused(safetensors::read_metadata(data));
    let Some(entries) = refused(safetensors::read_header(data)) else { return };
    // Listed ranges lie inside the file and share no byte (the format's own guarantee).
    let mut ranges: Vec<(u64, u64)> = entries.iter().filter(|e| e.bytes > 0).map(|e| (e.offset, e.offset + e.bytes)).collect();
    ranges.sort_unstable();
    assert!(ranges.iter().all(|&(_, end)| end <= data.len() as u64), "a range leaves the file: {ranges:?}");
    assert!(ranges.windows(2).all(|w| w[0].1 <= w[1].0), "ranges overlap: {ranges:?}");
    let names: std::collections::HashSet<&str> = entries.iter().map(|e| e.name.as_str()).collect();
    assert_eq!(names.len(), entries.len(), "a name is listed twice");
    for entry in entries.iter().filter(|e| e.element.is_some()) {
        read_listed(data, entry);
    }
}

/// A pasted matrix, as the page receives it (text, so invalid UTF-8 is replaced first).
pub fn text(data: &[u8]) {
    let pasted = String::from_utf8_lossy(data);
    if let Some(tensor) = refused(text::parse(&pasted)) {
        assert_eq!(tensor.values.len(), tensor.rows() * tensor.cols());
        assert_eq!(tensor.shape, [tensor.rows(), tensor.cols()]);
    }
}

/// Calibration data as the page and the command line load it. The first byte chooses the kind
/// (its two low bits) and whether the rest is a file or pasted text (bit 2); the next two bytes
/// are the weight's input width.
pub fn calib(data: &[u8]) {
    let [choice, width_lo, width_hi, rest @ ..] = data else { return };
    let kind = [CalibKind::Sample, CalibKind::MaxAbs, CalibKind::MeanAbs, CalibKind::Sample][usize::from(choice & 3)];
    let cols = usize::from(u16::from_le_bytes([*width_lo, *width_hi]));
    let loaded = if choice & 4 == 0 {
        refused(tensor::list(rest, ReadOptions::default()))
            .and_then(|listing| refused(listing.choose(None).cloned()))
            .and_then(|entry| read_listed(rest, &entry))
    } else {
        refused(text::parse(&String::from_utf8_lossy(rest)))
    };
    let Some(tensor) = loaded else { return };
    if let Some(calibration) = refused(Calibration::from_tensor(&tensor, kind, cols)) {
        assert_eq!(calibration.cols(), cols);
        assert_eq!((calibration.max_abs.len(), calibration.mean_abs.len(), calibration.mean_sq.len()), (cols, cols, cols));
        assert!(calibration.mean_sq.iter().all(|m| *m >= 0.0), "a negative second moment");
    }
}

/// A packed export read back (`bitloupe unpack`, the page's packed download read again).
pub fn unpack(data: &[u8]) {
    if let Some((shape, values)) = refused(packed::unpack(data)) {
        let view = tensor::view_2d(&shape).expect("an unpacked shape has a 2-D view");
        assert_eq!(values.dim(), view);
    }
}

/// A small weight and its activation sample for recipes to run on: 3 rows of 40 columns (not a
/// multiple of most group sizes), with one loud column.
fn workload() -> &'static (Tensor, Calibration) {
    static WORKLOAD: OnceLock<(Tensor, Calibration)> = OnceLock::new();
    WORKLOAD.get_or_init(|| {
        let mut rng = bitloupe::demo::Rng::new(7);
        let weight = Array2::from_shape_fn((3, 40), |(_, c)| rng.normal() as f32 * if c == 5 { 8.0 } else { 0.1 });
        let sample = Array2::from_shape_fn((24, 40), |(_, c)| rng.normal() as f32 * if c == 9 { 30.0 } else { 1.0 });
        (Tensor::from_values("w", DType::F32, weight), Calibration::from_sample(sample))
    })
}

/// A recipe as the page's link carries it (JSON of `Recipe`) and the names the command line and
/// the sweep parse; a recipe that validates must run, and its packed form must read back to the
/// same dequantized tensor.
pub fn recipe(data: &[u8]) {
    let text = String::from_utf8_lossy(data);
    refused(text.parse::<Granularity>());
    refused(text.parse::<ScaleDType>());
    refused(text.parse::<Method>());
    refused(text.parse::<Format>());
    refused(text.parse::<CalibKind>());
    let Some(recipe) = refused(Recipe::from_json(&text)) else { return };
    if refused(recipe.validate()).is_none() {
        return;
    }
    // A valid recipe survives the link: written as JSON and read back, it is the same recipe.
    let again: Recipe = serde_json::from_str(&serde_json::to_string(&recipe).expect("a recipe serialises")).expect("a written recipe reads back");
    assert_eq!(again, recipe, "the recipe changes through JSON");
    assert!(!recipe.label().is_empty());
    let (weight, calibration) = workload();
    let Some(analysis) = refused(analyze_with(weight, &recipe, Some(calibration), &mut |_, _| {})) else { return };
    if let Some(bytes) = refused(packed::pack(&analysis, weight)) {
        let (shape, values) = packed::unpack(&bytes[..]).expect("a packed file reads back");
        assert_eq!(shape, weight.shape);
        assert!(values.iter().zip(analysis.dequantized(weight).expect("the analysed tensor").iter()).all(|(a, b)| a.to_bits() == b.to_bits()), "unpack differs from the analysis");
    }
}
