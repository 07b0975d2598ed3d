//! A whole checkpoint under one recipe: every selected tensor of one or more `.safetensors`
//! files is read, quantized and measured, and the figures are summed into whole-model totals.
//!
//! Tensors are taken strictly one at a time, so peak memory is that of the largest single
//! analysis (the tensor in f32, its figures, and a reconstruction for methods other than plain
//! round to nearest) whatever the size of
//! the checkpoint; each analysis spreads its row blocks over every thread ([`crate::rows`]), so
//! no figure depends on the thread count.
//!
//! Totals (all over the quantized tensors):
//! * bits per weight = Σ total bits / Σ weights, every stored part counted ([`crate::cost`]);
//! * MSE = Σ(x − x̂)² / Σ weights, which is the weight-count-weighted mean of the tensors' MSE;
//! * relative error = √(Σ(x − x̂)² / Σx²) with both sums over every quantized weight, the
//!   whole-model relative Frobenius error (so large tensors and large weights count as they
//!   do in the model, and a tensor's MSE is not compared across scales); SQNR is its 10·log₁₀
//!   of the inverse square.

use crate::analysis::headline;
use crate::error::{Error, Result};
use crate::footprint;
use crate::recipe::{Method, Recipe};
use crate::report::CAUTION;
use crate::rows;
use crate::sizing::matches;
use crate::tensor::{self, ByteSource, DType, Listing, TensorEntry};
use serde::Serialize;

/// Identifies the JSON layout of a checkpoint report; bumped on any incompatible change.
pub const SCHEMA: &str = "bitloupe.checkpoint/1";

/// Which tensors a report quantizes.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Selection {
    /// Names to take, `*` standing for any run of characters ([`matches()`]).
    pub pattern: String,
    /// Also take 1-D tensors and scalars (norm scales, biases), which are left as stored by
    /// default, as a model's quantization usually leaves them.
    pub include_1d: bool,
    /// Memory the analyses may use, when known: a tensor whose analysis needs more is a failed
    /// row, refused before it is read ([`footprint::check`]).
    pub available_memory: Option<u64>,
}

/// One listed file of a checkpoint.
pub struct Shard<'a, S: ?Sized> {
    /// How rows name the file (its path as the user gave it).
    pub label: String,
    /// Its bytes.
    pub source: &'a S,
    /// Its tensors, from [`tensor::list`].
    pub listing: Listing,
}

/// What became of one tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Status {
    /// Quantized and measured.
    Quantized,
    /// Left out by the selection, before any of its data was read.
    Skipped,
    /// Selected, but reading or quantizing it failed.
    Failed,
}

impl Status {
    fn name(self) -> &'static str {
        match self {
            Status::Quantized => "quantized",
            Status::Skipped => "skipped",
            Status::Failed => "failed",
        }
    }
}

/// One tensor of the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TensorRow {
    /// The file it is in.
    pub file: String,
    /// Its name there.
    pub name: String,
    /// Shape as stored.
    pub shape: Vec<usize>,
    /// Element type (as the file spells it when the tool cannot read it).
    pub dtype: String,
    /// Element count.
    pub params: u64,
    /// What became of it.
    pub status: Status,
    /// Why it was skipped, or what made it fail.
    pub note: Option<String>,
    /// Bits per weight under the recipe, all parts counted.
    pub bits_per_weight: Option<f64>,
    /// Bits under the recipe.
    pub total_bits: Option<u64>,
    /// Mean squared error.
    pub mse: Option<f64>,
    /// SQNR in dB (`None` for an exact reconstruction too).
    pub sqnr_db: Option<f64>,
    /// ‖x − x̂‖_F / ‖x‖_F.
    pub rel_fro_err: Option<f64>,
    /// Largest absolute error.
    pub max_abs_err: Option<f32>,
}

/// Whole-model figures; see the module documentation for the exact definitions.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Totals {
    /// Tensors quantized.
    pub quantized_tensors: usize,
    /// Tensors skipped by the selection.
    pub skipped_tensors: usize,
    /// Tensors selected whose reading or quantization failed.
    pub failed_tensors: usize,
    /// Weights of the quantized tensors.
    pub params: u64,
    /// Their bits under the recipe.
    pub total_bits: u64,
    /// `total_bits / params` (`None` when nothing was quantized).
    pub bits_per_weight: Option<f64>,
    /// Σ(x − x̂)² / `params`.
    pub mse: Option<f64>,
    /// √(Σ(x − x̂)² / Σx²) over every quantized weight.
    pub rel_fro_err: Option<f64>,
    /// 10·log₁₀(Σx² / Σ(x − x̂)²) (`None` when exact or when nothing was quantized).
    pub sqnr_db: Option<f64>,
    /// Largest absolute error of any quantized weight.
    pub max_abs_err: Option<f32>,
    /// Elements of the tensors left as stored (skipped or failed).
    pub other_params: u64,
    /// Their stored bits.
    pub other_bits: u64,
    /// The files' bits per weight with the quantized tensors under the recipe and the rest as
    /// stored: (`total_bits` + `other_bits`) / (`params` + `other_params`).
    pub files_bits_per_weight: Option<f64>,
}

/// A checkpoint under one recipe.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CheckpointReport {
    /// [`SCHEMA`].
    pub schema: &'static str,
    /// The recipe every tensor was run with.
    pub recipe: Recipe,
    /// Its short label.
    pub label: String,
    /// Which tensors were taken.
    pub selection: Selection,
    /// One row per tensor of every file, files in the order given, tensors in name order.
    pub rows: Vec<TensorRow>,
    /// Whole-model figures.
    pub totals: Totals,
    /// [`CAUTION`].
    pub caution: &'static str,
}

/// Where a run is, for a progress display.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Progress<'a> {
    /// Selected tensors finished (quantized or failed).
    pub tensors_done: usize,
    /// Selected tensors in all.
    pub tensors: usize,
    /// Stored bytes of the selected tensors processed so far (the current one in proportion).
    pub bytes_done: u64,
    /// Stored bytes of every selected tensor.
    pub bytes: u64,
    /// The tensor being worked on ("" once finished).
    pub current: &'a str,
}

/// The note of a tensor whose name the pattern does not take.
const NOT_MATCHING: &str = "name does not match the pattern";

/// Why `entry` is left out, or `None` when the selection takes it.
pub(crate) fn skip_reason(entry: &TensorEntry, selection: &Selection) -> Option<String> {
    if !matches(&selection.pattern, &entry.name) {
        return Some(NOT_MATCHING.into());
    }
    // The row's dtype names the type, so that the notes stay few and can be counted.
    let Some(element) = entry.element else {
        return Some("element type not supported".into());
    };
    if !matches!(element.dtype, DType::F16 | DType::BF16 | DType::F32 | DType::F64) {
        return Some("integer elements (already quantized, or not a weight)".into());
    }
    if entry.shape.len() < 2 && !selection.include_1d {
        let what = if entry.shape.is_empty() { "a scalar" } else { "1-D (a norm scale or bias)" };
        return Some(format!("{what}: stays as stored unless 1-D tensors are asked for"));
    }
    if entry.shape.contains(&0) {
        return Some("it has no elements".into());
    }
    None
}

/// The element count of a listed shape, saturating (the shape may never be read).
fn params(shape: &[usize]) -> u64 {
    shape.iter().fold(1u64, |acc, &d| acc.saturating_mul(d as u64))
}

/// The calibration-based part of a recipe, which a checkpoint cannot serve: it holds weights
/// and no activations.
fn needs_calibration(recipe: &Recipe) -> Option<&'static str> {
    match recipe.method {
        Method::Gptq => Some("GPTQ"),
        Method::Awq => Some("AWQ"),
        _ if recipe.smooth.is_some() => Some("smoothing"),
        _ => None,
    }
}

/// The sums one quantized tensor adds to the totals.
struct Sums {
    params: u64,
    bits: u64,
    sum_sq_err: f64,
    sum_sq: f64,
    max_abs_err: f32,
}

/// Read, quantize and measure one selected tensor of the file labelled `file`.
fn measure<S: ByteSource + ?Sized>(
    file: &str,
    source: &S,
    entry: &TensorEntry,
    recipe: &Recipe,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<(TensorRow, Sums)> {
    let tensor = tensor::read(source, entry)?;
    let analysis = headline(&tensor, recipe, None, progress)?;
    let count = tensor.values.len() as u64;
    // The analysis gives MSE = Σ(x − x̂)²/n, so n·MSE is its error sum; Σx² is taken here in f64
    // because an exact reconstruction's relative error carries no trace of it.
    let sums = Sums {
        params: count,
        bits: analysis.cost.total_bits,
        sum_sq_err: analysis.totals.mse * count as f64,
        sum_sq: tensor.values.iter().map(|&x| f64::from(x) * f64::from(x)).sum(),
        max_abs_err: analysis.totals.max_abs_err,
    };
    let row = TensorRow {
        file: file.to_string(),
        name: entry.name.clone(),
        shape: entry.shape.clone(),
        dtype: tensor.dtype.name().into(),
        params: count,
        status: Status::Quantized,
        note: None,
        bits_per_weight: Some(analysis.cost.bits_per_weight),
        total_bits: Some(analysis.cost.total_bits),
        mse: Some(analysis.totals.mse),
        sqnr_db: analysis.totals.sqnr_db,
        rel_fro_err: Some(analysis.totals.rel_fro_err),
        max_abs_err: Some(analysis.totals.max_abs_err),
    };
    Ok((row, sums))
}

/// Run `recipe` over every tensor of `shards` that `selection` takes, one tensor in memory at a
/// time, calling `progress` before each tensor, now and then during it, and once at the end.
///
/// A tensor that cannot be read or quantized becomes a failed row with its message, and the run
/// goes on. The run itself fails only before any data is read: for a recipe that is invalid or
/// needs calibration, or when the selection takes no tensor at all.
pub fn run<S: ByteSource + ?Sized>(
    shards: &[Shard<S>],
    selection: &Selection,
    recipe: &Recipe,
    progress: &mut dyn FnMut(&Progress),
) -> Result<CheckpointReport> {
    recipe.validate()?;
    if let Some(what) = needs_calibration(recipe) {
        return Err(Error::BadRecipe {
            detail: format!("{what} needs calibration data, which a checkpoint does not hold; use rtn, clip or hqq for a whole checkpoint"),
        });
    }
    let plan: Vec<Vec<Option<String>>> =
        shards.iter().map(|s| s.listing.entries.iter().map(|e| skip_reason(e, selection)).collect()).collect();
    let selected = || shards.iter().zip(&plan).flat_map(|(s, reasons)| s.listing.entries.iter().zip(reasons)).filter(|(_, r)| r.is_none());
    let tensors = selected().count();
    if tensors == 0 {
        return Err(nothing_selected(shards, &plan, selection));
    }
    let bytes: u64 = selected().map(|(e, _)| e.bytes).sum();

    let mut rows = Vec::new();
    let mut all = Sums { params: 0, bits: 0, sum_sq_err: 0.0, sum_sq: 0.0, max_abs_err: 0.0 };
    let (mut other_params, mut other_bits, mut failed) = (0u64, 0u64, 0usize);
    let (mut tensors_done, mut bytes_done) = (0usize, 0u64);
    for (shard, reasons) in shards.iter().zip(&plan) {
        for (entry, reason) in shard.listing.entries.iter().zip(reasons) {
            let left_as_stored = |status: Status, note: String| TensorRow {
                file: shard.label.clone(),
                name: entry.name.clone(),
                shape: entry.shape.clone(),
                dtype: entry.element.map_or_else(|| entry.dtype_label.clone(), |el| el.dtype.name().into()),
                params: params(&entry.shape),
                status,
                note: Some(note),
                bits_per_weight: None,
                total_bits: None,
                mse: None,
                sqnr_db: None,
                rel_fro_err: None,
                max_abs_err: None,
            };
            let row = if let Some(reason) = reason {
                left_as_stored(Status::Skipped, reason.clone())
            } else {
                let at = |fraction: f64| bytes_done + (entry.bytes as f64 * fraction.clamp(0.0, 1.0)) as u64;
                progress(&Progress { tensors_done, tensors, bytes_done, bytes, current: &entry.name });
                let fits = selection.available_memory.map_or(Ok(()), |available| footprint::check(&entry.shape, &[*recipe], None, rows::threads(), false, available));
                let measured = fits.and_then(|()| {
                    measure(&shard.label, shard.source, entry, recipe, &mut |done, total| {
                        let fraction = if total == 0 { 0.0 } else { done as f64 / total as f64 };
                        progress(&Progress { tensors_done, tensors, bytes_done: at(fraction), bytes, current: &entry.name });
                    })
                });
                tensors_done += 1;
                bytes_done += entry.bytes;
                match measured {
                    Ok((row, sums)) => {
                        all.params += sums.params;
                        all.bits += sums.bits;
                        all.sum_sq_err += sums.sum_sq_err;
                        all.sum_sq += sums.sum_sq;
                        all.max_abs_err = all.max_abs_err.max(sums.max_abs_err);
                        row
                    }
                    Err(e) => {
                        failed += 1;
                        left_as_stored(Status::Failed, e.to_string())
                    }
                }
            };
            if row.status != Status::Quantized {
                other_params = other_params.saturating_add(row.params);
                other_bits = other_bits.saturating_add(entry.bytes.saturating_mul(8));
            }
            rows.push(row);
        }
    }
    progress(&Progress { tensors_done, tensors, bytes_done, bytes, current: "" });

    let quantized = tensors - failed;
    let some = |v: f64| (quantized > 0).then_some(v);
    let totals = Totals {
        quantized_tensors: quantized,
        skipped_tensors: rows.len() - tensors,
        failed_tensors: failed,
        params: all.params,
        total_bits: all.bits,
        bits_per_weight: some(all.bits as f64 / all.params as f64),
        mse: some(all.sum_sq_err / all.params as f64),
        rel_fro_err: some(if all.sum_sq_err == 0.0 { 0.0 } else { (all.sum_sq_err / all.sum_sq).sqrt() }),
        sqnr_db: (quantized > 0 && all.sum_sq_err > 0.0).then(|| 10.0 * (all.sum_sq / all.sum_sq_err).log10()),
        max_abs_err: (quantized > 0).then_some(all.max_abs_err),
        other_params,
        other_bits,
        files_bits_per_weight: {
            let weights = all.params.saturating_add(other_params);
            (weights > 0).then(|| (all.bits as f64 + other_bits as f64) / weights as f64)
        },
    };
    Ok(CheckpointReport { schema: SCHEMA, recipe: *recipe, label: recipe.label(), selection: selection.clone(), rows, totals, caution: CAUTION })
}

/// The error for a selection that takes nothing, saying what left the tensors out.
fn nothing_selected<S: ?Sized>(shards: &[Shard<S>], plan: &[Vec<Option<String>>], selection: &Selection) -> Error {
    let listed: usize = shards.iter().map(|s| s.listing.entries.len()).sum();
    let matching: Vec<(&TensorEntry, &String)> = shards
        .iter()
        .zip(plan)
        .flat_map(|(s, reasons)| s.listing.entries.iter().zip(reasons))
        .filter_map(|(entry, reason)| reason.as_ref().filter(|r| r.as_str() != NOT_MATCHING).map(|r| (entry, r)))
        .collect();
    let detail = match matching.first() {
        None => format!("none of the {listed} tensor names matches it"),
        Some((first, reason)) => format!(
            "{} tensor(s) match it but none can be quantized ('{}': {reason})",
            matching.len(),
            first.name.escape_debug()
        ),
    };
    Error::NothingSelected { pattern: selection.pattern.escape_debug().to_string(), detail }
}

/// A CSV field, quoted when it holds a separator, a quote or a line break (RFC 4180).
fn csv_field(text: &str) -> String {
    if text.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", text.replace('"', "\"\""))
    } else {
        text.to_string()
    }
}

impl CheckpointReport {
    /// The report as pretty JSON.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).expect("plain data; non-finite numbers become null")
    }

    /// One CSV row per tensor, then one row with status "total" (its file and shape empty, its
    /// params and bits those of the quantized tensors).
    pub fn to_csv(&self) -> String {
        let mut out = String::from("file,name,shape,dtype,params,status,bits_per_weight,total_bits,mse,sqnr_db,rel_fro_err,max_abs_err,note\n");
        let opt = |v: Option<f64>| v.map_or(String::new(), |x| format!("{x}"));
        for r in &self.rows {
            let shape: Vec<String> = r.shape.iter().map(usize::to_string).collect();
            out.push_str(&format!(
                "{},{},{},{},{},{},{},{},{},{},{},{},{}\n",
                csv_field(&r.file),
                csv_field(&r.name),
                shape.join("x"),
                csv_field(&r.dtype),
                r.params,
                r.status.name(),
                opt(r.bits_per_weight),
                r.total_bits.map_or(String::new(), |b| b.to_string()),
                opt(r.mse),
                opt(r.sqnr_db),
                opt(r.rel_fro_err),
                opt(r.max_abs_err.map(f64::from)),
                csv_field(r.note.as_deref().unwrap_or("")),
            ));
        }
        let t = &self.totals;
        out.push_str(&format!(
            ",,,,{},total,{},{},{},{},{},{},{}\n",
            t.params,
            opt(t.bits_per_weight),
            t.total_bits,
            opt(t.mse),
            opt(t.sqnr_db),
            opt(t.rel_fro_err),
            opt(t.max_abs_err.map(f64::from)),
            csv_field(&format!("{} quantized, {} skipped, {} failed", t.quantized_tensors, t.skipped_tensors, t.failed_tensors)),
        ));
        out
    }

    /// A few lines for a terminal.
    pub fn summary(&self) -> String {
        let t = &self.totals;
        let mut out = format!(
            "{}: {} tensor(s) quantized, {} skipped, {} failed\n",
            self.label, t.quantized_tensors, t.skipped_tensors, t.failed_tensors
        );
        if let (Some(bpw), Some(rel), Some(mse)) = (t.bits_per_weight, t.rel_fro_err, t.mse) {
            let sqnr = t.sqnr_db.map_or("exact".to_string(), |db| format!("{db:.2} dB"));
            out.push_str(&format!(
                "{} weights at {} bits per weight; whole-model relative error {rel:.4e} (SQNR {sqnr}), MSE {mse:.4e}\n",
                t.params,
                crate::report::four_places(bpw)
            ));
        }
        let mut reasons: Vec<(&str, usize)> = Vec::new();
        for r in self.rows.iter().filter(|r| r.status == Status::Skipped) {
            let note = r.note.as_deref().unwrap_or("");
            match reasons.iter_mut().find(|(seen, _)| *seen == note) {
                Some((_, n)) => *n += 1,
                None => reasons.push((note, 1)),
            }
        }
        for (reason, n) in reasons {
            out.push_str(&format!("skipped {n}: {reason}\n"));
        }
        for r in self.rows.iter().filter(|r| r.status == Status::Failed) {
            out.push_str(&format!("failed {} in {}: {}\n", r.name.escape_debug(), r.file, r.note.as_deref().unwrap_or("")));
        }
        out.push_str(self.caution);
        out.push('\n');
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::analyze;
    use crate::demo::Rng;
    use crate::tensor::safetensors::{write, Outgoing};
    use crate::tensor::{ReadOptions, Tensor};
    use half::{bf16, f16};
    use std::collections::BTreeMap;

    /// A stored tensor: its name, safetensors dtype, shape and the values it holds (after the
    /// dtype's rounding, so that they are exactly what a reader decodes).
    struct Stored {
        name: &'static str,
        dtype: &'static str,
        shape: Vec<usize>,
        values: Vec<f32>,
    }

    fn stored(name: &'static str, dtype: &'static str, shape: &[usize], seed: u64) -> Stored {
        let count = shape.iter().product();
        let mut rng = Rng::new(seed);
        let values: Vec<f32> = (0..count).map(|_| rng.normal() as f32 * 0.02).collect();
        let values = match dtype {
            "F16" => values.iter().map(|&v| f16::from_f32(v).to_f32()).collect(),
            "BF16" => values.iter().map(|&v| bf16::from_f32(v).to_f32()).collect(),
            _ => values,
        };
        Stored { name, dtype, shape: shape.to_vec(), values }
    }

    fn file(tensors: &[Stored]) -> Vec<u8> {
        let outgoing: Vec<Outgoing> = tensors
            .iter()
            .map(|t| Outgoing {
                name: t.name,
                dtype: t.dtype,
                shape: t.shape.clone(),
                data: match t.dtype {
                    "F16" => t.values.iter().flat_map(|&v| f16::from_f32(v).to_le_bytes()).collect(),
                    "BF16" => t.values.iter().flat_map(|&v| bf16::from_f32(v).to_le_bytes()).collect(),
                    "F32" => t.values.iter().flat_map(|&v| v.to_le_bytes()).collect(),
                    "I8" => t.values.iter().map(|&v| (v * 1000.0) as i8 as u8).collect(),
                    other => unreachable!("no test writes {other}"),
                },
            })
            .collect();
        write(&outgoing, &BTreeMap::new())
    }

    fn shards<'a>(files: &'a [(&str, Vec<u8>)]) -> Vec<Shard<'a, [u8]>> {
        files
            .iter()
            .map(|(label, bytes)| Shard {
                label: label.to_string(),
                source: bytes.as_slice(),
                listing: tensor::list(bytes.as_slice(), ReadOptions::default()).unwrap(),
            })
            .collect()
    }

    fn every(pattern: &str) -> Selection {
        Selection { pattern: pattern.into(), include_1d: false, available_memory: None }
    }

    fn row<'r>(report: &'r CheckpointReport, name: &str) -> &'r TensorRow {
        report.rows.iter().find(|r| r.name == name).unwrap()
    }

    /// Two shards with projection weights of three float types, a 3-D kernel, a norm scale and
    /// an integer tensor.
    fn checkpoint() -> (Vec<Stored>, Vec<Stored>) {
        let first = vec![
            stored("layers.0.proj.weight", "F32", &[8, 64], 1),
            stored("layers.0.norm.weight", "F32", &[64], 2),
            stored("layers.0.index", "I8", &[2, 2], 3),
        ];
        let second = vec![
            stored("layers.1.proj.weight", "F16", &[16, 128], 4),
            stored("layers.1.conv.weight", "BF16", &[4, 2, 32], 5),
        ];
        (first, second)
    }

    /// Source: each row must be what the single-tensor analysis reports for the same tensor
    /// (the report adds nothing of its own), and the totals the sums defined in the module
    /// documentation, computed here from the stored values.
    #[test]
    fn rows_match_single_analyses_and_totals_are_their_sums() {
        let (first, second) = checkpoint();
        let files = [("a.safetensors", file(&first)), ("b.safetensors", file(&second))];
        let recipe = Recipe::default();
        let report = run(&shards(&files), &every("*"), &recipe, &mut |_| {}).unwrap();
        assert_eq!(report.rows.len(), 5);
        let (mut params, mut bits, mut sum_sq_err, mut sum_sq) = (0u64, 0u64, 0f64, 0f64);
        for t in first.iter().chain(&second).filter(|t| t.shape.len() >= 2 && t.dtype != "I8") {
            let r = row(&report, t.name);
            assert_eq!(r.status, Status::Quantized, "{}", t.name);
            let (rows, cols) = tensor::view_2d(&t.shape).unwrap();
            let values = ndarray::Array2::from_shape_vec((rows, cols), t.values.clone()).unwrap();
            let direct = analyze(&Tensor::from_values(t.name, DType::F32, values), &recipe).unwrap();
            assert_eq!(r.bits_per_weight, Some(direct.cost.bits_per_weight), "{}", t.name);
            assert_eq!(r.total_bits, Some(direct.cost.total_bits), "{}", t.name);
            assert_eq!(r.mse, Some(direct.totals.mse), "{}", t.name);
            assert_eq!(r.rel_fro_err, Some(direct.totals.rel_fro_err), "{}", t.name);
            assert_eq!(r.max_abs_err, Some(direct.totals.max_abs_err), "{}", t.name);
            params += t.values.len() as u64;
            bits += direct.cost.total_bits;
            sum_sq_err += direct.totals.mse * t.values.len() as f64;
            sum_sq += t.values.iter().map(|&x| f64::from(x).powi(2)).sum::<f64>();
        }
        let totals = report.totals;
        assert_eq!((totals.quantized_tensors, totals.skipped_tensors, totals.failed_tensors), (3, 2, 0));
        assert_eq!((totals.params, totals.total_bits), (params, bits));
        assert_eq!(totals.bits_per_weight, Some(bits as f64 / params as f64));
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs();
        assert!(close(totals.mse.unwrap(), sum_sq_err / params as f64));
        assert!(close(totals.rel_fro_err.unwrap(), (sum_sq_err / sum_sq).sqrt()));
        assert!(close(totals.sqnr_db.unwrap(), 10.0 * (sum_sq / sum_sq_err).log10()));
        // The norm scale (64 f32) and the integer tensor (4 i8) stay as stored.
        assert_eq!((totals.other_params, totals.other_bits), (68, 64 * 32 + 4 * 8));
        assert_eq!(totals.files_bits_per_weight, Some((bits + 64 * 32 + 32) as f64 / (params + 68) as f64));
        assert_eq!(row(&report, "layers.0.proj.weight").file, "a.safetensors");
        assert_eq!(row(&report, "layers.1.conv.weight").file, "b.safetensors");
    }

    /// Source: cost.rs's worked example, 4-bit asymmetric groups of 128 with f16 scales costs
    /// 4 + (16 + 4)/128 = 4.15625 bits per weight on rows that are multiples of 128 long.
    #[test]
    fn model_bits_per_weight_of_whole_groups_is_the_recipes_own() {
        let tensors = [stored("a.weight", "F16", &[16, 128], 7), stored("b.weight", "F32", &[8, 256], 8)];
        let files = [("m.safetensors", file(&tensors))];
        let report = run(&shards(&files), &every("*"), &Recipe::default(), &mut |_| {}).unwrap();
        assert_eq!(report.totals.params, 4096);
        assert_eq!(report.totals.total_bits, 4096 * 4 + 32 * (16 + 4));
        assert_eq!(report.totals.bits_per_weight, Some(4.15625));
    }

    /// Source: the selection rules of the module (pattern with `*`, float tensors of two or
    /// more dimensions unless 1-D ones are asked for).
    #[test]
    fn the_selection_says_why_each_tensor_is_left_out() {
        let (first, second) = checkpoint();
        let files = [("a.safetensors", file(&first)), ("b.safetensors", file(&second))];
        let report = run(&shards(&files), &every("layers.*.weight"), &Recipe::default(), &mut |_| {}).unwrap();
        let note = |name| row(&report, name).note.clone().unwrap_or_default();
        assert!(note("layers.0.index").contains("does not match"), "{}", note("layers.0.index"));
        assert!(note("layers.0.norm.weight").starts_with("1-D"), "{}", note("layers.0.norm.weight"));
        assert_eq!(row(&report, "layers.1.conv.weight").status, Status::Quantized);

        let with_1d = Selection { pattern: "*".into(), include_1d: true, available_memory: None };
        let report = run(&shards(&files), &with_1d, &Recipe::default(), &mut |_| {}).unwrap();
        assert_eq!(row(&report, "layers.0.norm.weight").status, Status::Quantized);
        let index = row(&report, "layers.0.index");
        assert_eq!(index.status, Status::Skipped);
        assert_eq!(index.note.as_deref(), Some("integer elements (already quantized, or not a weight)"));
    }

    #[test]
    fn a_selection_of_nothing_and_a_recipe_needing_calibration_are_refused() {
        let (first, _) = checkpoint();
        let files = [("a.safetensors", file(&first))];
        let message = |pattern: &str, recipe: &Recipe| run(&shards(&files), &every(pattern), recipe, &mut |_| {}).unwrap_err().to_string();
        let none = message("*.bias", &Recipe::default());
        assert!(none.contains("none of the 3 tensor names"), "{none}");
        let only_1d = message("*.norm.*", &Recipe::default());
        assert!(only_1d.contains("1 tensor(s) match") && only_1d.contains("1-D"), "{only_1d}");
        let gptq = message("*", &Recipe { method: Method::Gptq, ..Recipe::default() });
        assert!(gptq.contains("GPTQ needs calibration"), "{gptq}");
    }

    /// Source: analysis refuses non-finite values (error.rs `NonFinite`); the report must keep
    /// going and count the tensor as stored.
    #[test]
    fn a_failing_tensor_is_a_row_with_its_message_and_the_run_goes_on() {
        let mut bad = stored("bad.weight", "F32", &[4, 32], 9);
        bad.values[5] = f32::NAN;
        let tensors = [bad, stored("good.weight", "F32", &[4, 32], 10)];
        let files = [("m.safetensors", file(&tensors))];
        let report = run(&shards(&files), &every("*"), &Recipe::default(), &mut |_| {}).unwrap();
        let failed = row(&report, "bad.weight");
        assert_eq!(failed.status, Status::Failed);
        assert!(failed.note.as_deref().unwrap().contains("1 NaN"), "{:?}", failed.note);
        assert_eq!(row(&report, "good.weight").status, Status::Quantized);
        assert_eq!((report.totals.failed_tensors, report.totals.params, report.totals.other_params), (1, 128, 128));
        assert!(report.summary().contains("failed bad.weight in m.safetensors"), "{}", report.summary());
    }

    #[test]
    fn progress_counts_tensors_and_bytes_up_to_the_total() {
        let (first, second) = checkpoint();
        let files = [("a.safetensors", file(&first)), ("b.safetensors", file(&second))];
        let mut seen = Vec::new();
        run(&shards(&files), &every("*"), &Recipe::default(), &mut |p| seen.push((p.tensors_done, p.tensors, p.bytes_done, p.bytes, p.current.to_string())))
            .unwrap();
        // Stored bytes of the three selected tensors: 8·64 f32, 16·128 f16, 4·2·32 bf16.
        let bytes = 8 * 64 * 4 + 16 * 128 * 2 + 4 * 2 * 32 * 2;
        assert!(seen.iter().all(|s| s.1 == 3 && s.3 == bytes));
        assert!(seen.windows(2).all(|w| w[0].2 <= w[1].2 && w[0].0 <= w[1].0), "progress went back");
        assert_eq!(seen.last().unwrap(), &(3, 3, bytes, bytes, String::new()));
        assert!(seen.iter().any(|s| s.4 == "layers.1.proj.weight"));
    }

    /// Source: crate::rows — row blocks are merged in row order, so a report is identical on any
    /// number of threads.
    #[test]
    fn reports_do_not_depend_on_the_thread_count() {
        let tensors = [stored("a.weight", "F32", &[300, 96], 11), stored("b.weight", "F16", &[130, 256], 12)];
        let files = [("m.safetensors", file(&tensors))];
        let on = |threads| {
            let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
            pool.install(|| run(&shards(&files), &every("*"), &Recipe::default(), &mut |_| {}).unwrap())
        };
        assert_eq!(on(1), on(3));
    }

    /// Source: RFC 4180 (fields holding a comma or a quote are quoted, quotes doubled).
    #[test]
    fn csv_quotes_names_and_ends_with_the_total() {
        let tensors = [stored("odd,\"name\"", "F32", &[4, 32], 13), stored("norm", "F32", &[32], 14)];
        let files = [("m.safetensors", file(&tensors))];
        let report = run(&shards(&files), &every("*"), &Recipe::default(), &mut |_| {}).unwrap();
        let csv = report.to_csv();
        let lines: Vec<&str> = csv.lines().collect();
        assert_eq!(lines.len(), 4, "{csv}");
        assert!(lines.iter().any(|l| l.starts_with("m.safetensors,\"odd,\"\"name\"\"\",4x32,f32,128,quantized,")), "{csv}");
        assert!(lines[3].starts_with(",,,,128,total,"), "{csv}");
        let json: serde_json::Value = serde_json::from_str(&report.to_json()).unwrap();
        assert_eq!(json["schema"], SCHEMA);
        assert_eq!(json["rows"].as_array().unwrap().len(), 2);
        assert!(json["caution"].as_str().unwrap().contains("proxy"));
    }
}
