//! What chooses the codes: round to nearest, clipping search, HQQ, GPTQ and AWQ, plus the two
//! outlier treatments that wrap any of them — folding per-column factors into the weight
//! (smoothing, AWQ) and keeping chosen values in 16-bit.
//!
//! Every method returns the reconstruction Ŵ in the original weight's space and the fitted
//! parameters of every group; `analysis` then measures Ŵ against W the same way for all.

pub mod awq;
pub mod clip;
pub mod gptq;
pub mod hqq;
pub mod keep;
pub mod smooth;

use crate::calib::Calibration;
use crate::error::{Error, Result};
use crate::formats::{codebook, DoubleQuantized, Format, Grid};
use crate::grid::{GroupParams, ScaleOverflow};
use crate::recipe::{Granularity, Method, Recipe};
use crate::rows;
use std::mem::MaybeUninit;
use ndarray::{Array2, ArrayView2};
use serde::Serialize;

/// The figures a method reports about its own work.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "name", rename_all = "lowercase")]
pub enum MethodFigures {
    /// Round to nearest.
    Rtn,
    /// Clipping search.
    Clip {
        /// Mean of the chosen range ratios over all groups.
        mean_ratio: f32,
        /// Whether candidates were ranked by output-weighted error (calibration) or weight MSE.
        output_weighted: bool,
    },
    /// Half-quadratic zero points.
    Hqq(hqq::HqqFigures),
    /// Error-compensating rounding.
    Gptq(gptq::GptqFigures),
    /// Activation-aware scaling.
    Awq(awq::AwqFigures),
}

/// A reconstruction and how it was made.
#[derive(Debug, Clone, PartialEq)]
pub struct Quantized {
    /// Ŵ in the original weight's space.
    pub dequantized: Array2<f32>,
    /// Fitted parameters of every group, row-major (one for a per-tensor recipe).
    pub params: Vec<GroupParams>,
    /// The method's own figures.
    pub figures: MethodFigures,
    /// The output error of `dequantized`, when the method already measured it (AWQ does).
    pub output: Option<crate::calib::OutputError>,
    /// Per-column factors s the grid saw W·diag(s) through (smoothing, AWQ), if any.
    pub column_factors: Option<Vec<f32>>,
    /// The fitted levels of each group, for codebooks (empty otherwise).
    pub codebooks: Vec<Vec<f32>>,
    /// The double-quantized NF4 block constants, when asked for.
    pub double_quant: Option<DoubleQuantized>,
    /// The values kept in 16-bit.
    pub kept: keep::Kept,
}

impl Quantized {
    /// A round-to-nearest result with nothing else attached.
    pub fn plain(dequantized: Array2<f32>, params: Vec<GroupParams>) -> Self {
        Quantized {
            dequantized,
            params,
            figures: MethodFigures::Rtn,
            output: None,
            column_factors: None,
            codebooks: Vec::new(),
            double_quant: None,
            kept: keep::Kept::default(),
        }
    }
}

/// Run the recipe's method (with its smoothing and kept values) on weight `w`.
/// `reference` is X·Wᵀ when the calibration holds a sample.
pub fn run(
    w: ArrayView2<f32>,
    recipe: &Recipe,
    calib: Option<&Calibration>,
    reference: Option<&Array2<f32>>,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Quantized> {
    let needs = |what: &str| Error::BadRecipe { detail: format!("{what} needs calibration data") };
    let kept = keep::Kept::choose(w, recipe, calib);
    if recipe.method == Method::Awq {
        let calib = calib.ok_or_else(|| needs("AWQ"))?;
        return awq::run(w, recipe, calib, reference, &kept, progress);
    }
    let column_factors = match recipe.smooth {
        Some(alpha) => Some(smooth::factors(w, calib.ok_or_else(|| needs("smoothing"))?, alpha)),
        None => None,
    };
    let scaled = column_factors.as_ref().map(|s| scale_columns(w, s));
    let target = match &scaled {
        Some(s) => s.view(),
        None => w.view(),
    };
    let mut q = match recipe.method {
        Method::Rtn => rtn(target, recipe, &kept)?,
        Method::Clip => clip::run(target, recipe, calib, &kept)?,
        Method::Hqq => hqq::run(target, recipe, &kept)?,
        Method::Gptq => {
            let calib = calib.ok_or_else(|| needs("GPTQ"))?;
            if calib.sample.is_none() {
                return Err(Error::BadRecipe {
                    detail: "GPTQ needs an activation sample [tokens, cols], not only per-column statistics".into(),
                });
            }
            gptq::run(target, recipe, calib, column_factors.as_deref(), &kept, progress)?
        }
        Method::Awq => unreachable!("handled above"),
    };
    if let Some(s) = &column_factors {
        unscale_columns(&mut q.dequantized, s);
    }
    // GPTQ already wrote each kept value as its compensated value in f16.
    if recipe.method != Method::Gptq {
        kept.restore(w, &mut q.dequantized);
    }
    q.column_factors = column_factors;
    q.kept = kept;
    Ok(q)
}

/// Round to nearest, group by group, with kept values left out of the fit.
pub fn rtn(w: ArrayView2<f32>, recipe: &Recipe, kept: &keep::Kept) -> Result<Quantized> {
    if recipe.format == Format::Codebook {
        return codebooks(w, recipe, kept);
    }
    let (mut grouped, double_quant) = round_to_nearest(w, recipe, kept, &(), Reconstruction::Keep, &mut |_, _| {})?;
    Ok(Quantized { double_quant, ..Quantized::plain(grouped.kept_out(), grouped.params) })
}

/// NF4's double-quantized block constants, when the recipe asks for them.
type DoubleQuant = Option<DoubleQuantized>;

/// Round to nearest over the rows of `w` in one pass, showing each finished run of groups and
/// its reconstruction to `observer` while both are still in cache, and keeping the
/// reconstruction or not as `reconstruction` says. This is the plain recipe's path, and the
/// speed benchmark's subject.
pub(crate) fn round_to_nearest<O: RowObserver>(
    w: ArrayView2<f32>,
    recipe: &Recipe,
    kept: &keep::Kept,
    observer: &O,
    reconstruction: Reconstruction,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<(Grouped<(), O::Total>, DoubleQuant)> {
    let grid = Grid::new(recipe);
    let quantize = |p: GroupParams, x: &[f32], out: &mut [MaybeUninit<f32>], _| grid.write_quantized(p, x, out);
    let fit = |x: &[f32], _, _| grid.fit(x).map(|p| (p, ()));
    if !recipe.double_quant {
        return Ok((quantize_groups(w, recipe, kept, fit, quantize, observer, reconstruction, progress)?, None));
    }
    // Fit every block first, quantize the block constants, then quantize with them.
    let zeros = |_: GroupParams, _: &[f32], out: &mut [MaybeUninit<f32>], _| out.iter_mut().for_each(|o| _ = o.write(0.0));
    let fitted = quantize_groups(w, recipe, kept, fit, zeros, &(), Reconstruction::Discard, &mut |_, _| {})?.params;
    let dq = DoubleQuantized::of(&fitted);
    let scales = dq.scales();
    let (width, per_row) = (group_width(recipe.granularity, w.ncols()), recipe.granularity.groups_per_row(w.ncols()));
    let stored = |_: &[f32], r: usize, col0: usize| Ok((GroupParams { scale: scales[r * per_row + col0 / width], zero: 0.0 }, ()));
    Ok((quantize_groups(w, recipe, kept, stored, quantize, observer, reconstruction, progress)?, Some(dq)))
}

/// A codebook per tensor or per row, fitted by Lloyd–Max; kept values stay out of the fit.
pub fn codebooks(w: ArrayView2<f32>, recipe: &Recipe, kept: &keep::Kept) -> Result<Quantized> {
    let masked = kept.masked(w);
    let source = match &masked {
        Some(m) => m.view(),
        None => w.view(),
    };
    let source = source.as_standard_layout();
    let count = 1usize << recipe.bits;
    let (rows, cols) = w.dim();
    let mut out = Array2::<f32>::zeros((rows, cols));
    let mut books = Vec::new();
    let fill = |values: &[f32], dst: &mut [f32], book: &[f32]| {
        let mids = codebook::midpoints(book);
        for (o, &v) in dst.iter_mut().zip(values) {
            *o = codebook::nearest_level(book, &mids, v);
        }
    };
    let all = source.as_slice().expect("standard layout");
    // Levels beyond f16 are stored as infinities, which no error figure could survive.
    let fit = |values: &[f32], row: Option<usize>| {
        let levels = codebook::fit(values, count).levels;
        match levels.iter().all(|l| l.is_finite()) {
            true => Ok(levels),
            false => Err(Error::LevelOverflow { row, max_abs: values.iter().fold(0f32, |m, v| m.max(v.abs())) }),
        }
    };
    if recipe.granularity == Granularity::Tensor {
        let book = fit(all, None)?;
        fill(all, out.as_slice_mut().expect("row-major"), &book);
        books.push(book);
    } else {
        for (r, (x, mut o)) in source.rows().into_iter().zip(out.rows_mut()).enumerate() {
            let x = x.to_slice().expect("standard layout");
            let book = fit(x, Some(r))?;
            fill(x, o.as_slice_mut().expect("row-major"), &book);
            books.push(book);
        }
    }
    let params = vec![GroupParams { scale: 1.0, zero: 0.0 }; books.len()];
    Ok(Quantized { codebooks: books, ..Quantized::plain(out, params) })
}

/// Width of the groups of a row (the whole row for per-row and per-tensor recipes).
pub fn group_width(granularity: Granularity, cols: usize) -> usize {
    match granularity {
        Granularity::Group(g) => g,
        Granularity::Row | Granularity::Tensor => cols.max(1),
    }
}

/// Sees every finished block of rows (see [`crate::rows`]), a run of whole groups at a time, and
/// sums what it needs into one partial result per block, which it then folds into its total in
/// row order.
pub(crate) trait RowObserver: Sync {
    /// The partial result of one block.
    type Block: Send;
    /// What the blocks add up to.
    type Total: Send;
    /// An empty partial result for the block of `rows` rows starting at `first_row`.
    fn start(&self, first_row: usize, rows: usize) -> Self::Block;
    /// Take in the whole groups of row `r` from column `first_col` on: the tensor's values `x`
    /// and their reconstruction `x_hat`. A row's runs come in column order.
    fn groups(&self, block: &mut Self::Block, r: usize, first_col: usize, x: &[f32], x_hat: &[f32]);
    /// Row `r` is complete.
    fn end_row(&self, block: &mut Self::Block, r: usize);
    /// Every row of the block is complete (work that belongs to the block goes here, on the
    /// thread that computed it, rather than after all blocks on one thread).
    fn end_block(&self, _block: &mut Self::Block) {}
    /// The total before any block of a tensor of `rows` rows.
    fn empty_total(&self, rows: usize) -> Self::Total;
    /// Add the next block, in row order, to the total.
    fn fold(&self, total: &mut Self::Total, block: Self::Block);
}

/// Observes nothing.
impl RowObserver for () {
    type Block = ();
    type Total = ();
    fn start(&self, _: usize, _: usize) {}
    fn groups(&self, _: &mut (), _: usize, _: usize, _: &[f32], _: &[f32]) {}
    fn end_row(&self, _: &mut (), _: usize) {}
    fn empty_total(&self, _: usize) {}
    fn fold(&self, _: &mut (), _: ()) {}
}

/// Two observers seeing the same rows, each with its own blocks and total.
impl<A: RowObserver, B: RowObserver> RowObserver for (&A, &B) {
    type Block = (A::Block, B::Block);
    type Total = (A::Total, B::Total);
    fn start(&self, first_row: usize, rows: usize) -> Self::Block {
        (self.0.start(first_row, rows), self.1.start(first_row, rows))
    }
    fn groups(&self, block: &mut Self::Block, r: usize, first_col: usize, x: &[f32], x_hat: &[f32]) {
        self.0.groups(&mut block.0, r, first_col, x, x_hat);
        self.1.groups(&mut block.1, r, first_col, x, x_hat);
    }
    fn end_row(&self, block: &mut Self::Block, r: usize) {
        self.0.end_row(&mut block.0, r);
        self.1.end_row(&mut block.1, r);
    }
    fn end_block(&self, block: &mut Self::Block) {
        self.0.end_block(&mut block.0);
        self.1.end_block(&mut block.1);
    }
    fn empty_total(&self, rows: usize) -> Self::Total {
        (self.0.empty_total(rows), self.1.empty_total(rows))
    }
    fn fold(&self, total: &mut Self::Total, block: Self::Block) {
        self.0.fold(&mut total.0, block.0);
        self.1.fold(&mut total.1, block.1);
    }
}

/// Columns a run of groups spans at most (unless one group is wider): a run's values, its
/// reconstruction and its three per-column sums (20 KiB in all) are still in L1 when the
/// observer reads them; a whole wide row would not be (14336 columns: 280 KiB).
const RUN_COLUMNS: usize = 1024;

/// The runs of whole groups of `width` columns that a row of `cols` columns is observed in.
fn runs(cols: usize, width: usize) -> impl Iterator<Item = std::ops::Range<usize>> {
    let step = (RUN_COLUMNS / width).max(1) * width;
    (0..cols).step_by(step).map(move |start| start..(start + step).min(cols))
}

/// Whether [`quantize_groups`] keeps the reconstruction or only shows it to the observer.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Reconstruction {
    /// Return it: the tensor's size again in fresh memory.
    Keep,
    /// Write each row into one reused row of scratch and drop it once observed: for figures that
    /// need nothing else of it (every plain analysis, whose reconstruction is made again on
    /// request), or fits that only need the parameters. The memory traffic of
    /// writing the tensor out again is saved too.
    Discard,
}

/// What [`quantize_groups`] produces.
pub(crate) struct Grouped<T, O> {
    /// The reconstruction, when it was kept.
    pub out: Option<Array2<f32>>,
    /// Every group's parameters, row-major (one for a per-tensor recipe).
    pub params: Vec<GroupParams>,
    /// What the fit said about each group, in the same order.
    pub notes: Vec<T>,
    /// The observer's total.
    pub observed: O,
}

impl<T, O> Grouped<T, O> {
    /// The reconstruction of a pass run with [`Reconstruction::Keep`].
    pub fn kept_out(&mut self) -> Array2<f32> {
        self.out.take().expect("the pass kept its reconstruction")
    }
}

/// Fit and quantize every group of `w`, blocks of rows in parallel (see [`crate::rows`]):
/// `fit(values, row, first column)` chooses the parameters (kept values are zeroed first so they
/// do not stretch the range) and a note about the group, `quantize(params, values, out, first
/// column)` writes the group's reconstruction — every place of `out`, which is fresh memory —
/// and `observer` sees every finished run of groups. For a per-tensor recipe the one fit sees the whole
/// tensor row-major, so its value j belongs to column j mod cols.
#[allow(clippy::too_many_arguments)]
pub(crate) fn quantize_groups<T: Send, O: RowObserver>(
    w: ArrayView2<f32>,
    recipe: &Recipe,
    kept: &keep::Kept,
    fit: impl Fn(&[f32], usize, usize) -> std::result::Result<(GroupParams, T), ScaleOverflow> + Sync + Send,
    quantize: impl Fn(GroupParams, &[f32], &mut [MaybeUninit<f32>], usize) + Sync + Send,
    observer: &O,
    reconstruction: Reconstruction,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Grouped<T, O::Total>> {
    let masked = kept.masked(w);
    let source = match &masked {
        Some(m) => m.view(),
        None => w.view(),
    };
    let (rows, cols) = w.dim();
    let width = group_width(recipe.granularity, cols);
    let overflow = |row: usize, col: usize| move |e: ScaleOverflow| e.at(recipe.scale_dtype, row, col);
    let source = source.as_standard_layout();
    let all = source.as_slice().expect("standard layout");
    let groups = recipe.granularity.group_count(rows, cols);
    let (mut params, mut notes) = (Vec::with_capacity(groups), Vec::with_capacity(groups));
    let whole = match recipe.granularity {
        Granularity::Tensor => {
            let (p, note) = fit(all, 0, 0).map_err(overflow(0, 0))?;
            params.push(p);
            notes.push(note);
            Some(p)
        }
        _ => None,
    };
    // One block's parameters, notes and observations so far.
    type Block<T, S> = (Vec<GroupParams>, Vec<T>, S);
    // Row `r` into `out_row`, each run of groups observed while it is still in cache.
    let quantize_row = |r: usize, out_row: &mut [MaybeUninit<f32>], block: &mut Block<T, O::Block>| -> Result<()> {
        let x_row = &all[r * cols..(r + 1) * cols];
        for run in runs(cols, width) {
            let (x_run, out_run) = (&x_row[run.clone()], &mut out_row[run.clone()]);
            for (k, (x, o)) in x_run.chunks(width).zip(out_run.chunks_mut(width)).enumerate() {
                let col0 = run.start + k * width;
                let p = match whole {
                    Some(p) => p,
                    None => {
                        let (p, note) = fit(x, r, col0).map_err(overflow(r, col0))?;
                        block.0.push(p);
                        block.1.push(note);
                        p
                    }
                };
                quantize(p, x, o, col0);
            }
            // SAFETY: the groups tile the run and `quantize` wrote every place of each.
            let written = unsafe { std::slice::from_raw_parts(out_run.as_ptr().cast::<f32>(), out_run.len()) };
            observer.groups(&mut block.2, r, run.start, x_run, written);
        }
        observer.end_row(&mut block.2, r);
        Ok(())
    };
    let start = |first: usize, block_rows: usize| (Vec::new(), Vec::new(), observer.start(first, block_rows));
    let end = |mut block: Block<T, O::Block>| {
        observer.end_block(&mut block.2);
        block
    };
    // Parameters, notes and the observer's total, each block added in row order; the first error
    // in row order wins.
    let total = Ok((params, notes, observer.empty_total(rows)));
    let fold = |total: &mut Result<(Vec<GroupParams>, Vec<T>, O::Total)>, block: Result<Block<T, O::Block>>| {
        let Ok((params, notes, observed)) = total else { return };
        match block {
            Ok((p, n, seen)) => {
                params.extend(p);
                notes.extend(n);
                observer.fold(observed, seen);
            }
            Err(e) => *total = Err(e),
        }
    };
    // The output is written exactly once, row by row; it is never zeroed first.
    let mut out = Vec::<f32>::new();
    let total = match reconstruction {
        Reconstruction::Keep => {
            out.reserve_exact(rows * cols);
            let work = |first, out_block: &mut [MaybeUninit<f32>]| {
                let mut block = start(first, out_block.len() / cols);
                for (i, out_row) in out_block.chunks_mut(cols).enumerate() {
                    quantize_row(first + i, out_row, &mut block)?;
                }
                Ok(end(block))
            };
            rows::fold_blocks_mut(&mut out.spare_capacity_mut()[..rows * cols], cols, progress, total, work, fold)
        }
        Reconstruction::Discard => {
            let work = |range: std::ops::Range<usize>| {
                let mut block = start(range.start, range.len());
                let mut scratch = Vec::<f32>::with_capacity(cols);
                for r in range {
                    quantize_row(r, scratch.spare_capacity_mut(), &mut block)?;
                }
                Ok(end(block))
            };
            rows::fold_blocks(rows, progress, total, work, fold)
        }
    };
    let (params, notes, observed) = total?;
    let out = (reconstruction == Reconstruction::Keep).then(|| {
        // SAFETY: every block returned Ok, so each wrote all of its rows (see above).
        unsafe { out.set_len(rows * cols) };
        Array2::from_shape_vec((rows, cols), out).expect("rows × cols values")
    });
    Ok(Grouped { out, params, notes, observed })
}

/// Run `work` with this thread's scratch buffer (fits that try several candidates reuse it
/// rather than allocate per group).
pub(crate) fn with_scratch<R>(work: impl FnOnce(&mut Vec<f32>) -> R) -> R {
    thread_local! {
        static SCRATCH: std::cell::RefCell<Vec<f32>> = const { std::cell::RefCell::new(Vec::new()) };
    }
    SCRATCH.with(|s| work(&mut s.borrow_mut()))
}

/// W·diag(s).
pub fn scale_columns(w: ArrayView2<f32>, s: &[f32]) -> Array2<f32> {
    let mut out = w.to_owned();
    for mut row in out.rows_mut() {
        for (v, f) in row.iter_mut().zip(s) {
            *v *= f;
        }
    }
    out
}

/// Ŵ·diag(s)⁻¹, in place.
pub fn unscale_columns(w: &mut Array2<f32>, s: &[f32]) {
    for mut row in w.rows_mut() {
        for (v, f) in row.iter_mut().zip(s) {
            *v /= f;
        }
    }
}
