//! The memory one analysis holds at its peak, by recipe, so that a run that cannot fit is refused
//! with a message before anything is allocated for it: the command asks the system what it can
//! still give, the page what its WebAssembly memory (4 GiB at most) has left. The page weighs an
//! export of a result the same way ([`export_bytes`]).
//!
//! An upper estimate built from what each step holds at once, with w the tensor's size as f32
//! (4 bytes per element):
//!
//! - the tensor itself, w (counted only when it is not yet read);
//! - every group's parameters and figures, [`BYTES_PER_GROUP`] (HQQ's fits hold more,
//!   [`BYTES_PER_HQQ_GROUP`], and double quantization the first fit's parameters), and as much
//!   again for the groups of the row blocks in flight (two per thread: one being computed, one
//!   waiting to be added in row order);
//! - whole copies of the tensor beside it ([`copies`]): none for the plain recipe, which keeps no
//!   reconstruction; one for the reconstruction of every other recipe; one more for a weight
//!   seen through factors or with kept values masked out (smoothing, AWQ, kept columns), two more
//!   for the magnitudes that choose the kept fraction and the masked copy, one more for AWQ's
//!   clipping search and for GPTQ's working copy of W;
//! - GPTQ's two square matrices of the input width ([`crate::methods::gptq`]);
//! - with calibration, the output error's sums and figure per output row (counted always);
//! - with an activation sample, the reference output X·Wᵀ (tokens × rows) and as much again
//!   while it is put together from its blocks (or for the smoothed output);
//! - the per-column totals and figures, and the per-column sums of the row blocks in flight;
//! - per thread, the row in flight, and with a sample the row block gathered for the output
//!   error and its product with the sample;
//! - a codebook's levels;
//! - a sixteenth of the tensor for row blocks that finish early and wait for those before them
//!   to be added (each holds its per-column sums), and the allocator's rounding;
//! - [`FIXED_BYTES`] for what does not grow with the tensor (the linear algebra's workspaces).
//!
//! Each term is taken from the code's structure and checked against a counting allocator over
//! every kind of recipe, with a sample, with per-column statistics and without calibration
//! (`tests/memory.rs`): the estimate is never below the measured peak, and at most twice it plus
//! a quarter of the tensor's size (the fixed part aside). The same test passes on layers of
//! 4096 × 2048, 1000 × 4096 and 20000 × 128 in a release build.

use crate::analysis::{is_plain, Analysis};
use crate::calib::Calibration;
use crate::error::{Error, Result};
use crate::formats::Format;
use crate::methods::gptq::PEAK_SQUARE_MATRICES;
use crate::recipe::{Method, Recipe};
use crate::rows::{self, ROW_BLOCK};
use crate::tensor::{element_count, view_2d, Tensor};

/// Parameters (8 bytes), their notes and the per-group figures, with room for the vectors' growth.
pub const BYTES_PER_GROUP: u64 = 40;

/// HQQ keeps the fitted zero point and its iterations' state per group as well.
pub const BYTES_PER_HQQ_GROUP: u64 = 64;

/// Per-column sums of a row block in flight (three per column).
const COLUMN_SUM_BYTES: u64 = 24;

/// The output error's sums and figure per output row, with calibration: two f64 and one f32.
const OUTPUT_ROW_BYTES: u64 = 24;

/// Per-column totals and figures of the whole tensor.
const COLUMN_BYTES: u64 = 48;

/// A vector's own header, for the codebooks' one per row.
const VEC_BYTES: u64 = 24;

/// Workspaces that do not grow with the tensor: the linear algebra's per-thread scratch, the
/// allocator's own books.
pub const FIXED_BYTES: u64 = 16 << 20;

/// Whole copies of the tensor an analysis under `recipe` holds beside the tensor at its peak.
pub fn copies(recipe: &Recipe) -> u64 {
    if is_plain(recipe) {
        return 0;
    }
    let reconstruction = 1;
    let transformed = u64::from(recipe.smooth.is_some() || recipe.method == Method::Awq || recipe.keep_cols > 0);
    let kept_fraction = if recipe.keep_frac > 0.0 { 2 } else { 0 };
    let search_or_working_copy = u64::from((recipe.method == Method::Awq && recipe.awq_clip) || recipe.method == Method::Gptq);
    reconstruction + transformed.max(kept_fraction) + search_or_working_copy
}

/// Bytes an analysis of a `rows × cols` tensor under `recipe` holds at its peak beyond the tensor's
/// own f32 copy, with `tokens` rows of activation sample (if any) on `threads` threads.
pub fn working_bytes(rows: usize, cols: usize, recipe: &Recipe, tokens: Option<usize>, threads: usize) -> u64 {
    // In 128 bits: GPTQ's squares of a 2^32-column vector, or tokens × rows of a one-column
    // weight, pass 2^64; the sum then saturates, which any memory refuses.
    let wide = |n: usize| n as u128;
    let (rows, cols, threads, tokens) = (wide(rows), wide(cols), wide(threads.max(1)), wide(tokens.unwrap_or(0)));
    let tensor = rows * cols * 4;
    let per_group = if recipe.method == Method::Hqq { BYTES_PER_HQQ_GROUP } else { BYTES_PER_GROUP };
    let per_group = u128::from(per_group + if recipe.double_quant { 8 } else { 0 });
    let group_count = wide(recipe.granularity.group_count(rows as usize, cols as usize));
    // Each thread's row block, and one more waiting for its turn to be added (`rows`).
    let groups_in_flight = (2 * threads * wide(ROW_BLOCK)).min(rows) * wide(recipe.granularity.groups_per_row(cols as usize));
    let groups = (group_count + groups_in_flight) * per_group;
    // GPTQ holds its squares only with a sample (without one it refuses to run).
    let squares = if recipe.method == Method::Gptq && tokens > 0 { wide(PEAK_SQUARE_MATRICES) * cols * cols * 4 } else { 0 };
    let outputs = 2 * tokens * rows * 4;
    let output_rows = rows * u128::from(OUTPUT_ROW_BYTES);
    let columns = u128::from(COLUMN_BYTES) * cols + 2 * threads * u128::from(COLUMN_SUM_BYTES) * cols;
    let row_scratch = cols * 4;
    let output_block = if tokens > 0 { wide(ROW_BLOCK) * (cols + tokens) * 4 } else { 0 };
    let codebooks = if recipe.format == Format::Codebook { group_count * ((1 << recipe.bits) * 4 + u128::from(VEC_BYTES)) } else { 0 };
    let total = u128::from(copies(recipe)) * tensor + groups + squares + outputs + output_rows + columns + threads * (row_scratch + output_block) + codebooks + tensor / 16 + u128::from(FIXED_BYTES);
    u64::try_from(total).unwrap_or(u64::MAX)
}

/// Refuse to analyse a tensor of `shape` under the most demanding of `recipes` when that needs
/// more than the `available` bytes: the tensor's f32 copy and the working memory when the tensor
/// is not yet read (`tensor_held` false), the working memory alone when it is. `tokens` is the
/// activation sample's length, if there is one. Recipes that are not valid are left to the
/// analysis, which says what is wrong with them. The message names the recipe and gives both sizes.
pub fn check(shape: &[usize], recipes: &[Recipe], tokens: Option<usize>, threads: usize, tensor_held: bool, available: u64) -> Result<()> {
    let count = element_count(shape)?;
    let (rows, cols) = view_2d(shape)?;
    let working = |recipe: &&Recipe| working_bytes(rows, cols, recipe, tokens, threads);
    let Some(recipe) = recipes.iter().filter(|r| r.validate().is_ok()).max_by_key(working) else { return Ok(()) };
    let tensor = count as u64 * 4;
    let needed = working(&recipe).saturating_add(if tensor_held { 0 } else { tensor });
    if needed <= available {
        return Ok(());
    }
    let what = match tensor_held {
        true => format!("{} of memory beside the tensor's own {},", size(needed), size(tensor)),
        false => format!("{} of memory", size(needed)),
    };
    Err(Error::BadShape {
        shape: shape.to_vec(),
        detail: format!("{} on its {count} elements needs about {what} and {} are available", recipe.label(), size(available)),
    })
}

/// [`check`] for a tensor already read, with its calibration (if any), on the current threads:
/// the last check before a run.
pub fn check_read(tensor: &Tensor, recipes: &[Recipe], calib: Option<&Calibration>, available: u64) -> Result<()> {
    let tokens = calib.and_then(|c| c.sample.as_ref()).map(|x| x.nrows());
    check(&tensor.shape, recipes, tokens, rows::threads(), true, available)
}

/// Bytes an export of `analysis` (its reconstruction as `.npy`, or its packed file) holds at its
/// peak beside what is already held, with w the tensor's size as f32: the reconstruction, unless
/// the result keeps it (the plain recipe's is made again), w; then 2w for the larger of the two
/// files: the `.npy` file is w, and the packed one is checked by reading it back, which holds the
/// read-back tensor (w) beside the codes (at most a byte a value, with room for their growth:
/// w/2), the file (w/4) and the codes read from it (w/4); every group's parameters, as written
/// and as read back ([`BYTES_PER_GROUP`]); the positions of the values kept in 16-bit, which the
/// packing looks up in a set ([`KEPT_POSITION_BYTES`]); a sixteenth of the tensor for the
/// allocator's rounding; and [`FIXED_BYTES`].
pub fn export_bytes(analysis: &Analysis) -> u64 {
    let (rows, cols) = analysis.dim();
    let tensor = rows as u128 * cols as u128 * 4;
    let reconstruction = if analysis.holds_reconstruction() { 0 } else { tensor };
    let kept = analysis.kept.columns.len() as u128 * rows as u128 + analysis.kept.elements.len() as u128;
    let groups = analysis.params.len() as u128 * u128::from(BYTES_PER_GROUP);
    let total = reconstruction + 2 * tensor + groups + kept * u128::from(KEPT_POSITION_BYTES) + tensor / 16 + u128::from(FIXED_BYTES);
    u64::try_from(total).unwrap_or(u64::MAX)
}

/// Refuse to export `analysis` when [`export_bytes`], with `more` bytes the caller holds beside
/// (another file of the same export), is more than the `available` bytes.
pub fn check_export(analysis: &Analysis, more: u64, available: u64) -> Result<()> {
    let needed = export_bytes(analysis).saturating_add(more);
    match needed <= available {
        true => Ok(()),
        false => Err(Error::ExportTooLarge { elements: analysis.dim().0 * analysis.dim().1, needed, available }),
    }
}

/// A value kept in 16-bit, while a result is packed: its position in a list and in a hash set
/// (with the set's spare room), and the value.
pub const KEPT_POSITION_BYTES: u64 = 64;

/// Bytes in GiB with two decimals (a need just above what is left must not read the same), or in
/// MiB below one GiB.
pub fn size(bytes: u64) -> String {
    match bytes >= 1 << 30 {
        true => format!("{:.2} GiB", bytes as f64 / (1u64 << 30) as f64),
        false => format!("{:.1} MiB", bytes as f64 / (1u64 << 20) as f64),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::recipe::Granularity;

    #[test]
    fn the_plain_recipe_needs_little_beyond_the_tensor_and_gptq_its_squares() {
        let plain = Recipe::default();
        // 4096 × 14336 in groups of 128: 458 752 groups of 40 bytes and those of the row blocks
        // in flight, the output rows, the columns' sums, the rows in flight, a sixteenth of the
        // tensor and the fixed part, about 0.23 of its 224 MiB.
        let working = working_bytes(4096, 14336, &plain, None, 2);
        assert_eq!(working, (458_752 + 2 * 2 * 64 * 112) * 40 + 4096 * 24 + 14336 * 48 + 2 * 2 * 14336 * 24 + 2 * 14336 * 4 + 4096 * 14336 * 4 / 16 + (16 << 20));
        let gptq = Recipe { method: Method::Gptq, ..plain };
        let squares = 2 * 14336 * 14336 * 4;
        assert!(working_bytes(4096, 14336, &gptq, Some(512), 2) > squares + 2 * 4096 * 14336 * 4);
        let kept = Recipe { keep_frac: 0.01, granularity: Granularity::Row, ..plain };
        assert_eq!(copies(&kept), 3);
        // GPTQ on a vector of 2^32 values: its squares pass 2^64 bytes, and the estimate saturates.
        assert_eq!(working_bytes(1, 1 << 32, &gptq, Some(1), 2), u64::MAX);
    }

    #[test]
    fn a_run_that_cannot_fit_is_refused_with_both_sizes() {
        let shape = [4096, 14336];
        let plain = Recipe::default();
        let needed = working_bytes(4096, 14336, &plain, None, 2) + 4096 * 14336 * 4;
        assert!(check(&shape, &[plain], None, 2, false, needed).is_ok());
        let err = check(&shape, &[plain], None, 2, false, needed - 1).unwrap_err().to_string();
        assert!(err.contains("int4 asym g128") && err.contains("58720256 elements needs about 274.8 MiB of memory and 274.8 MiB are available"), "{err}");
        let hqq = Recipe { method: Method::Hqq, ..plain };
        let err = check(&shape, &[plain, hqq, plain], None, 2, true, 100 << 20).unwrap_err().to_string();
        assert!(err.ends_with("int4 asym g128 f16 hqq on its 58720256 elements needs about 285.9 MiB of memory beside the tensor's own 224.0 MiB, and 100.0 MiB are available"), "{err}");
        let err = check(&[65536, 8192], &[hqq], None, 2, false, 3 << 30).unwrap_err().to_string();
        assert!(err.contains("needs about 4.") && err.contains("and 3.00 GiB are available"), "{err}");
        assert!(check(&shape, &[], None, 2, true, 0).is_ok(), "nothing to run");
        let invalid = Recipe { granularity: Granularity::Group(0), ..plain };
        assert!(check(&shape, &[invalid], None, 2, true, 0).is_ok(), "left to the analysis to refuse");
        // GPTQ without a sample does not run, so its squares are not counted.
        let gptq = Recipe { method: Method::Gptq, ..plain };
        assert!(working_bytes(64, 23168, &gptq, None, 2) < 1 << 30);
        assert!(working_bytes(64, 23168, &gptq, Some(64), 2) > 4 << 30);
    }

    #[test]
    fn an_export_that_cannot_fit_is_refused_with_both_sizes() {
        let mut rng = crate::demo::Rng::new(3);
        let tensor = Tensor::from_values("w", crate::tensor::DType::F32, ndarray::Array2::from_shape_fn((256, 512), |_| rng.normal() as f32));
        let plain = crate::analyze(&tensor, &Recipe::default()).unwrap();
        let hqq = crate::analyze(&tensor, &Recipe { method: Method::Hqq, ..Recipe::default() }).unwrap();
        // The plain recipe makes its reconstruction again (w beside the 2w of the files); HQQ
        // keeps its own. w = 512 KiB, 1024 groups of 40 bytes, a sixteenth of w, the fixed part.
        let w = 256 * 512 * 4;
        assert_eq!(export_bytes(&plain), 3 * w + 1024 * 40 + w / 16 + FIXED_BYTES);
        assert_eq!(export_bytes(&hqq), 2 * w + 1024 * 40 + w / 16 + FIXED_BYTES);
        let needed = export_bytes(&plain);
        assert!(check_export(&plain, 0, needed).is_ok());
        let err = check_export(&plain, 1, needed).unwrap_err().to_string();
        assert_eq!(err, "exporting the reconstruction of these 131072 values needs about 17.6 MiB of memory beside what is held, and 17.6 MiB are available");
    }
}
