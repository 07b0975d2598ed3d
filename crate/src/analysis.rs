//! One recipe run on one tensor (and, optionally, its calibration data): the reconstruction, the
//! error figures per tensor, per group and per input column, the output error when there is
//! calibration, and the bit budget. Every front end reaches the core through [`analyze_with`]
//! (or [`analyze`] without calibration).
//!
//! A plain round to nearest does not keep its reconstruction: it is measured row by row while in
//! cache (with calibration, its output error one row block at a time) and made again only when
//! asked for (an export), the same values bit for bit, since it is a function of the tensor and
//! the recipe alone. Keeping it would double the memory of the most common analysis and add the
//! tensor's size again to its memory traffic.

use crate::calib::{output_error, Calibration, OutputError, RowSums};
use crate::cost::BitCost;
use crate::error::{Error, Result};
use crate::formats::{DoubleQuantized, Format, Grid};
use crate::methods::keep::Kept;
use crate::grid::GroupParams;
use crate::methods::{self, group_width, MethodFigures, Reconstruction, RowObserver};
use crate::metrics::{ColumnBlock, ColumnFigures, ColumnSums, ErrorFigures, ErrorSums, GroupFigures};
use crate::rows::{self, ROW_BLOCK};
use crate::recipe::{Granularity, Method, Recipe};
use crate::tensor::Tensor;
use ndarray::{s, Array2, ArrayView1, ArrayView2};
use std::borrow::Cow;
use std::ops::Range;

/// Everything one analysis produces.
#[derive(Debug, Clone, PartialEq)]
pub struct Analysis {
    /// The recipe that was run.
    pub recipe: Recipe,
    /// The reconstruction x̂ in the tensor's 2-D view, or `None` for a plain recipe, whose
    /// reconstruction [`Analysis::dequantized`] makes again.
    kept_reconstruction: Option<Array2<f32>>,
    /// Rows and columns of the tensor's 2-D view.
    dim: (usize, usize),
    /// Fitted scale and zero point of every group, row-major as in `groups`.
    pub params: Vec<GroupParams>,
    /// Whole-tensor figures.
    pub totals: ErrorFigures,
    /// Per-group figures.
    pub groups: GroupFigures,
    /// Per-input-column figures.
    pub columns: ColumnFigures,
    /// The bit budget.
    pub cost: BitCost,
    /// The method's own figures.
    pub method: MethodFigures,
    /// The output error, when calibration data was given.
    pub output: Option<OutputError>,
    /// Per-column factors the grid saw the weight through (smoothing, AWQ): a group's grid
    /// applies to its values times these.
    pub column_factors: Option<Vec<f32>>,
    /// The fitted levels of each group, for codebooks (empty otherwise).
    pub codebooks: Vec<Vec<f32>>,
    /// The double-quantized NF4 block constants, when asked for.
    pub double_quant: Option<DoubleQuantized>,
    /// The values kept in 16-bit.
    pub kept: Kept,
}

/// Run `recipe` on `tensor` without calibration data.
pub fn analyze(tensor: &Tensor, recipe: &Recipe) -> Result<Analysis> {
    analyze_with(tensor, recipe, None, &mut |_, _| {})
}

/// Run `recipe` on `tensor` with optional calibration, calling `progress(done, total)` now and
/// then (the unit depends on the method: rows, columns or search steps).
pub fn analyze_with(
    tensor: &Tensor,
    recipe: &Recipe,
    calib: Option<&Calibration>,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Analysis> {
    checked(tensor, recipe, calib, |a: &Analysis| a.totals.mse, || run(tensor, recipe, calib, Detail::Full, progress))
}

/// The whole-tensor figures of one recipe on one tensor: what a sweep's row or a checkpoint
/// report's row needs, and nothing it does not.
#[derive(Debug, Clone, PartialEq)]
pub struct Headline {
    /// The recipe that was run.
    pub recipe: Recipe,
    /// Whole-tensor figures, exactly as [`analyze_with`] gives them.
    pub totals: ErrorFigures,
    /// The bit budget.
    pub cost: BitCost,
    /// The output error, when calibration data was given.
    pub output: Option<OutputError>,
}

/// [`analyze_with`]'s whole-tensor figures alone, without the per-group and per-column ones.
pub fn headline(
    tensor: &Tensor,
    recipe: &Recipe,
    calib: Option<&Calibration>,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Headline> {
    let measured = || {
        let a = run(tensor, recipe, calib, Detail::Totals, progress)?;
        Ok(Headline { recipe: a.recipe, totals: a.totals, cost: a.cost, output: a.output })
    };
    checked(tensor, recipe, calib, |h: &Headline| h.totals.mse, measured)
}

/// How much a run measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Detail {
    /// Everything, per group and per input column.
    Full,
    /// The whole-tensor and output figures only (the per-group and per-column ones are left
    /// empty); those it gives are computed exactly as with `Full`.
    Totals,
}

/// Whether a recipe takes the plain path: round to nearest on a grid, with nothing before it.
pub(crate) fn is_plain(recipe: &Recipe) -> bool {
    recipe.method == Method::Rtn
        && recipe.format != Format::Codebook
        && recipe.smooth.is_none()
        && recipe.keep_cols == 0
        && recipe.keep_frac == 0.0
}

/// Check the recipe against the tensor and calibration, then `measured()`. Finiteness is checked
/// after the run rather than by a separate pass over the tensor: a NaN makes the error sums NaN,
/// an infinity makes its scale overflow, and either way the precise count and location are then
/// looked up.
fn checked<T>(
    tensor: &Tensor,
    recipe: &Recipe,
    calib: Option<&Calibration>,
    mse: impl Fn(&T) -> f64,
    measured: impl FnOnce() -> Result<T>,
) -> Result<T> {
    recipe.validate()?;
    let (rows, cols) = (tensor.rows(), tensor.cols());
    if rows * cols == 0 {
        return Err(Error::BadShape { shape: tensor.shape.clone(), detail: "it has no elements".into() });
    }
    if let Some(c) = calib {
        if c.cols() != cols {
            return Err(Error::BadCalibration {
                detail: format!("it has {} columns but the weight has {cols} input columns", c.cols()),
            });
        }
    }
    if recipe.keep_cols > cols {
        return Err(Error::BadRecipe { detail: format!("cannot keep {} columns of a tensor with {cols}", recipe.keep_cols) });
    }
    let run = measured();
    let non_finite = match &run {
        Ok(result) => mse(result).is_nan(),
        Err(_) => true,
    };
    if non_finite {
        tensor.scan().non_finite.check()?;
    }
    run
}

/// What is measured of every row: per-group and per-column sums, taken over blocks of rows
/// (see [`crate::rows`]) and combined in row order.
struct Measure {
    cols: usize,
    width: usize,
    per_row: usize,
    group_size: Option<usize>,
    whole_tensor: bool,
    detail: Detail,
}

/// The sums of one block of rows.
struct BlockSums {
    /// Per group of the block's rows, row-major (one for a per-tensor recipe), while the block
    /// is being measured.
    groups: Vec<ErrorSums>,
    /// The sums of those groups, added in order once the block is complete.
    total: ErrorSums,
    /// Their figures (with every detail, and not for a per-tensor recipe, whose one group spans
    /// every block).
    figures: Option<GroupFigures>,
    columns: Option<ColumnBlock>,
}

/// The blocks' sums added up in row order.
struct Measured {
    total: ErrorSums,
    /// With every detail.
    columns: Option<ColumnSums>,
    /// With every detail, and not for a per-tensor recipe.
    groups: Option<GroupFigures>,
}

impl Measure {
    fn new(recipe: &Recipe, cols: usize, detail: Detail) -> Self {
        let whole_tensor = recipe.granularity == Granularity::Tensor;
        Measure {
            cols,
            width: group_width(recipe.granularity, cols),
            per_row: if whole_tensor { 1 } else { recipe.granularity.groups_per_row(cols) },
            group_size: match recipe.granularity {
                Granularity::Group(g) => Some(g),
                _ => None,
            },
            whole_tensor,
            detail,
        }
    }

    /// Measure rows already reconstructed (by a method other than the plain path).
    fn rows(&self, x: ArrayView2<f32>, x_hat: ArrayView2<f32>) -> Measured {
        let (x, x_hat) = (x.as_standard_layout(), x_hat.as_standard_layout());
        let (x, x_hat) = (x.as_slice().expect("standard layout"), x_hat.as_slice().expect("standard layout"));
        let cols = self.cols;
        let work = |range: Range<usize>| {
            let mut block = self.start(range.start, range.len());
            for r in range {
                self.groups(&mut block, r, 0, &x[r * cols..(r + 1) * cols], &x_hat[r * cols..(r + 1) * cols]);
                self.end_row(&mut block, r);
            }
            self.end_block(&mut block);
            block
        };
        let rows = x.len() / cols.max(1);
        rows::fold_blocks(rows, &mut |_, _| {}, self.empty_total(rows), work, |total, block| self.fold(total, block))
    }

    /// The whole-tensor figures, and with every detail the per-group and per-column ones.
    fn finish(&self, measured: Measured) -> (ErrorFigures, GroupFigures, ColumnFigures) {
        let groups = match measured.groups {
            Some(groups) => groups,
            None if self.whole_tensor && self.detail == Detail::Full => {
                GroupFigures::from_sums(1, 1, self.group_size, std::slice::from_ref(&measured.total))
            }
            None => GroupFigures::empty(self.per_row, self.group_size, 0),
        };
        let columns = measured.columns.unwrap_or_else(|| ColumnSums::new(0));
        (measured.total.figures(), groups, columns.figures())
    }
}

impl RowObserver for Measure {
    type Block = BlockSums;
    type Total = Measured;

    fn start(&self, _: usize, rows: usize) -> BlockSums {
        let groups = if self.whole_tensor { 1 } else { rows * self.per_row };
        BlockSums {
            groups: vec![ErrorSums::default(); groups],
            total: ErrorSums::default(),
            figures: None,
            columns: (self.detail == Detail::Full).then(|| ColumnBlock::new(self.cols)),
        }
    }

    fn groups(&self, block: &mut BlockSums, r: usize, first_col: usize, x: &[f32], x_hat: &[f32]) {
        let first = if self.whole_tensor { 0 } else { (r % ROW_BLOCK) * self.per_row + first_col / self.width };
        for (k, (xg, og)) in x.chunks(self.width).zip(x_hat.chunks(self.width)).enumerate() {
            let sums = &mut block.groups[if self.whole_tensor { 0 } else { first + k }];
            match &mut block.columns {
                Some(columns) => sums.add_with_columns(xg, og, columns, first_col + k * self.width),
                None => sums.add(xg, og),
            }
        }
    }

    fn end_row(&self, block: &mut BlockSums, _: usize) {
        if let Some(columns) = &mut block.columns {
            columns.end_row();
        }
    }

    fn end_block(&self, block: &mut BlockSums) {
        block.groups.iter().for_each(|g| block.total.merge(g));
        if !self.whole_tensor && self.detail == Detail::Full {
            let rows = block.groups.len() / self.per_row;
            block.figures = Some(GroupFigures::from_sums(rows, self.per_row, None, &block.groups));
        }
        block.groups = Vec::new();
    }

    fn empty_total(&self, rows: usize) -> Measured {
        let full = self.detail == Detail::Full;
        Measured {
            total: ErrorSums::default(),
            columns: full.then(|| ColumnSums::new(self.cols)),
            groups: (full && !self.whole_tensor).then(|| GroupFigures::empty(self.per_row, self.group_size, rows * self.per_row)),
        }
    }

    fn fold(&self, measured: &mut Measured, block: BlockSums) {
        measured.total.merge(&block.total);
        if let (Some(columns), Some(block)) = (&mut measured.columns, &block.columns) {
            columns.add_block(block);
        }
        if let (Some(groups), Some(block)) = (&mut measured.groups, &block.figures) {
            groups.append(block);
        }
    }
}

/// Takes the output error of a reconstruction one row block at a time as the plain path makes
/// it: with a sample the block's rows are gathered into scratch and multiplied there, with
/// statistics the estimate is summed as the rows come, so the reconstruction is never held
/// whole. The figures are those of [`output_error`] on the whole reconstruction, bit for bit
/// (the same blocks, the same sums).
struct OutputObserver<'a> {
    calib: &'a Calibration,
    weight: ArrayView2<'a, f32>,
    reference: Option<&'a Array2<f32>>,
}

/// One row block's reconstruction (gathered only with a sample: the diagonal estimate is summed
/// run by run as the rows come), and its sums.
struct OutputBlock {
    first_row: usize,
    x_hat: Option<Array2<f32>>,
    sums: RowSums,
}

impl RowObserver for OutputObserver<'_> {
    type Block = OutputBlock;
    type Total = RowSums;

    fn start(&self, first_row: usize, rows: usize) -> OutputBlock {
        match self.calib.sample {
            Some(_) => OutputBlock { first_row, x_hat: Some(Array2::zeros((rows, self.weight.ncols()))), sums: RowSums::default() },
            None => OutputBlock { first_row, x_hat: None, sums: RowSums::zeros(rows) },
        }
    }

    fn groups(&self, block: &mut OutputBlock, r: usize, first_col: usize, x: &[f32], x_hat: &[f32]) {
        let row = r - block.first_row;
        match &mut block.x_hat {
            Some(gathered) => gathered.row_mut(row).slice_mut(s![first_col..first_col + x_hat.len()]).assign(&ArrayView1::from(x_hat)),
            None => block.sums.add_estimated_run(self.calib, row, first_col, ArrayView1::from(x), ArrayView1::from(x_hat)),
        }
    }

    fn end_row(&self, _: &mut OutputBlock, _: usize) {}

    fn end_block(&self, block: &mut OutputBlock) {
        if let Some(x_hat) = block.x_hat.take() {
            let weight = self.weight.slice(s![block.first_row..block.first_row + x_hat.nrows(), ..]);
            block.sums.add_rows(self.calib, weight, x_hat.view(), self.reference, block.first_row);
        }
    }

    fn empty_total(&self, rows: usize) -> RowSums {
        RowSums::with_capacity(rows)
    }

    fn fold(&self, total: &mut RowSums, block: OutputBlock) {
        total.append(block.sums);
    }
}

fn run(
    tensor: &Tensor,
    recipe: &Recipe,
    calib: Option<&Calibration>,
    detail: Detail,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Analysis> {
    let (rows, cols) = (tensor.rows(), tensor.cols());
    let measure = Measure::new(recipe, cols, detail);
    let reference = calib.and_then(|c| c.reference_output(tensor.values.view()));
    let cost = BitCost::of(recipe, rows, cols, tensor.dtype.bits());
    // The hot path keeps no reconstruction (its result holds an empty one, dropped below): each
    // row is measured while it is still in cache, and with calibration its output error is taken
    // one row block at a time.
    let plain = is_plain(recipe);
    let (observed, output, q) = if plain {
        let view = tensor.values.view();
        let discard = Reconstruction::Discard;
        let no_reconstruction = |params, double_quant| methods::Quantized { double_quant, ..methods::Quantized::plain(Array2::zeros((0, 0)), params) };
        match calib {
            None => {
                let (grouped, double_quant) = methods::round_to_nearest(view, recipe, &Kept::default(), &measure, discard, progress)?;
                (grouped.observed, None, no_reconstruction(grouped.params, double_quant))
            }
            Some(calib) => {
                let outputs = OutputObserver { calib, weight: view, reference: reference.as_deref() };
                let (grouped, double_quant) = methods::round_to_nearest(view, recipe, &Kept::default(), &(&measure, &outputs), discard, progress)?;
                let (observed, sums) = grouped.observed;
                (observed, Some(sums.output_error(calib)), no_reconstruction(grouped.params, double_quant))
            }
        }
    } else {
        let mut q = methods::run(tensor.values.view(), recipe, calib, reference.as_deref(), progress)?;
        let observed = measure.rows(tensor.values.view(), q.dequantized.view());
        let output = q.output.take().or_else(|| calib.map(|c| output_error(c, tensor.values.view(), q.dequantized.view(), reference.as_deref())));
        (observed, output, q)
    };
    let methods::Quantized { dequantized, params, figures: method, output: _, column_factors, codebooks, double_quant, kept } = q;
    let (totals, groups, columns) = measure.finish(observed);
    Ok(Analysis {
        recipe: *recipe,
        kept_reconstruction: (!plain).then_some(dequantized),
        dim: (rows, cols),
        params,
        totals,
        groups,
        columns,
        cost,
        method,
        output,
        column_factors,
        codebooks,
        double_quant,
        kept,
    })
}

impl Analysis {
    /// Rows and columns of the analysed tensor's 2-D view.
    pub fn dim(&self) -> (usize, usize) {
        self.dim
    }

    /// Whether the result keeps its reconstruction (every recipe but the plain one), so that an
    /// export need not make it again.
    pub fn holds_reconstruction(&self) -> bool {
        self.kept_reconstruction.is_some()
    }

    /// The reconstruction x̂ in the 2-D view of `tensor`, which must be the tensor analysed: a
    /// plain recipe's is made again from it, and measured again on the way, so that a tensor
    /// whose parameters or whole-tensor figures differ from the result's, bit for bit, is refused;
    /// any other recipe's was kept.
    pub fn dequantized(&self, tensor: &Tensor) -> Result<Cow<'_, Array2<f32>>> {
        if let Some(x_hat) = &self.kept_reconstruction {
            return Ok(Cow::Borrowed(x_hat));
        }
        let not_analysed = || Error::NotTheAnalysedTensor { shape: tensor.shape.clone() };
        if (tensor.rows(), tensor.cols()) != self.dim {
            return Err(not_analysed());
        }
        let measure = Measure::new(&self.recipe, self.dim.1, Detail::Totals);
        let (again, _) = methods::round_to_nearest(tensor.values.view(), &self.recipe, &Kept::default(), &measure, Reconstruction::Keep, &mut |_, _| {})?;
        let methods::Grouped { out, params, observed, .. } = again;
        match out {
            Some(x_hat) if params == self.params && measure.finish(observed).0 == self.totals => Ok(Cow::Owned(x_hat)),
            _ => Err(not_analysed()),
        }
    }

    /// The rows and columns (of the 2-D view) that group `index` covers.
    pub fn group_span(&self, index: usize) -> Option<(Range<usize>, Range<usize>)> {
        let (rows, cols) = self.dim;
        if index >= self.groups.rows * self.groups.per_row {
            return None;
        }
        Some(match self.recipe.granularity {
            Granularity::Tensor => (0..rows, 0..cols),
            Granularity::Row => (index..index + 1, 0..cols),
            Granularity::Group(g) => {
                let (r, k) = (index / self.groups.per_row, index % self.groups.per_row);
                (r..r + 1, k * g..((k + 1) * g).min(cols))
            }
        })
    }

    /// Every value the grid of group `index` can represent, in increasing order.
    pub fn grid_points(&self, index: usize) -> Vec<f32> {
        let one = |list: usize| if list == 1 { 0 } else { index };
        if self.recipe.format == Format::Codebook {
            return self.codebooks.get(one(self.codebooks.len())).cloned().unwrap_or_default();
        }
        match self.params.get(one(self.params.len())) {
            Some(&p) => Grid::new(&self.recipe).points(p),
            None => Vec::new(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::grid::IntGrid;
    use crate::recipe::ScaleDType;
    use crate::tensor::DType;

    fn tensor(rows: usize, cols: usize, seed: u64) -> Tensor {
        let mut rng = crate::demo::Rng::new(seed);
        let values = Array2::from_shape_fn((rows, cols), |_| rng.normal() as f32);
        Tensor::from_values("t", DType::F32, values)
    }

    /// Rebuild every element with the scalar reference of the grid, group by group.
    fn reference(t: &Tensor, recipe: &Recipe) -> Vec<f32> {
        let grid = IntGrid::new(recipe);
        let width = match recipe.granularity {
            Granularity::Group(g) => g,
            _ => t.cols(),
        };
        let all: Vec<f32> = t.values.iter().copied().collect();
        let global = grid.fit(&all).unwrap();
        let mut out = Vec::new();
        for row in t.values.rows() {
            let row: Vec<f32> = row.to_vec();
            for group in row.chunks(width) {
                let p = if recipe.granularity == Granularity::Tensor { global } else { grid.fit(group).unwrap() };
                out.extend(group.iter().map(|&v| (grid.code_reference(p, v) - p.zero) * p.scale));
            }
        }
        out
    }

    #[test]
    fn matches_the_scalar_reference_over_odd_shapes() {
        let shapes = [(1, 1), (3, 7), (2, 8), (5, 129), (4, 300), (1, 1000)];
        let granularities = [Granularity::Tensor, Granularity::Row, Granularity::Group(8), Granularity::Group(128)];
        for (i, &(rows, cols)) in shapes.iter().enumerate() {
            let t = tensor(rows, cols, i as u64);
            for granularity in granularities {
                for (bits, symmetric) in [(2, false), (3, true), (4, false), (8, true)] {
                    let recipe = Recipe { bits, granularity, symmetric, scale_dtype: ScaleDType::BF16, ..Recipe::default() };
                    let a = analyze(&t, &recipe).unwrap();
                    let got: Vec<f32> = a.dequantized(&t).unwrap().iter().copied().collect();
                    assert_eq!(got, reference(&t, &recipe), "{rows}x{cols} {}", recipe.label());
                    assert_eq!(a.params.len() as u64, a.cost.groups);
                    assert_eq!(a.groups.mse.len(), a.groups.rows * a.groups.per_row);
                    if granularity == Granularity::Tensor {
                        let one = f64::from(a.groups.mse[0]);
                        assert!((one - a.totals.mse).abs() <= 1e-6 * a.totals.mse.max(1e-30));
                    }
                }
            }
        }
    }

    #[test]
    fn a_plain_reconstruction_is_made_again_only_from_the_analysed_tensor() {
        let t = tensor(4, 300, 3);
        let plain = analyze(&t, &Recipe::default()).unwrap();
        assert!(matches!(plain.dequantized(&t).unwrap(), Cow::Owned(_)));
        assert_eq!(*plain.dequantized(&t).unwrap(), methods::rtn(t.values.view(), &Recipe::default(), &Kept::default()).unwrap().dequantized);
        assert!(matches!(plain.dequantized(&tensor(4, 300, 4)), Err(Error::NotTheAnalysedTensor { .. })), "same shape, other values");
        assert!(matches!(plain.dequantized(&tensor(3, 400, 3)), Err(Error::NotTheAnalysedTensor { .. })), "other shape");
        // The same fit, other values: [0, 0.5, 1] and [0, 0.3, 1] share their range.
        let row = |v: Vec<f32>| Tensor::from_values("r", DType::F32, Array2::from_shape_vec((1, 3), v).unwrap());
        let per_row = Recipe { granularity: Granularity::Row, ..Recipe::default() };
        let a = analyze(&row(vec![0.0, 0.5, 1.0]), &per_row).unwrap();
        assert!(matches!(a.dequantized(&row(vec![0.0, 0.3, 1.0])), Err(Error::NotTheAnalysedTensor { .. })), "same parameters, other values");
        let hqq = analyze(&t, &Recipe { method: Method::Hqq, ..Recipe::default() }).unwrap();
        assert!(matches!(hqq.dequantized(&t).unwrap(), Cow::Borrowed(_)), "other methods keep theirs");
    }

    /// The plain path's output error, taken block by block as the rows are made, against
    /// `output_error` on the whole reconstruction made again: the same bits, over row counts of
    /// one, one whole row block and not a multiple of it, for a sample and for per-column
    /// statistics, on one thread and four.
    #[test]
    fn a_plain_output_error_taken_block_by_block_is_the_whole_one() {
        use crate::calib::CalibKind;
        for (rows, cols) in [(1, 7), (64, 3), (70, 33), (129, 300)] {
            let t = tensor(rows, cols, 11);
            let sample = Calibration::from_sample(tensor(9, cols, 12).values);
            let stats = Calibration::from_tensor(&Tensor::from_values("s", DType::F32, Array2::from_elem((1, cols), 0.5)), CalibKind::MaxAbs, cols).unwrap();
            for calib in [&sample, &stats] {
                for recipe in [Recipe::default(), Recipe { granularity: Granularity::Tensor, bits: 3, ..Recipe::default() }] {
                    let on = |threads| rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap().install(|| analyze_with(&t, &recipe, Some(calib), &mut |_, _| {}).unwrap());
                    let (one, four) = (on(1), on(4));
                    let x_hat = one.dequantized(&t).unwrap();
                    let whole = output_error(calib, t.values.view(), x_hat.view(), calib.reference_output(t.values.view()).as_deref());
                    for a in [&one, &four] {
                        let got = a.output.as_ref().unwrap();
                        assert_eq!(got.rel_err.to_bits(), whole.rel_err.to_bits(), "{rows}x{cols} {}", recipe.label());
                        assert!(got.per_row.iter().zip(&whole.per_row).all(|(a, b)| a.to_bits() == b.to_bits()));
                        assert_eq!((got.per_row.len(), got.estimated), (rows, calib.sample.is_none()));
                    }
                    assert!(whole.rel_err > 0.0, "a 3- or 4-bit grid leaves an error");
                }
            }
        }
    }

    #[test]
    fn group_figures_add_up_to_the_totals() {
        let t = tensor(6, 300, 9);
        let a = analyze(&t, &Recipe { granularity: Granularity::Group(128), ..Recipe::default() }).unwrap();
        assert_eq!((a.groups.rows, a.groups.per_row, a.groups.group_size), (6, 3, Some(128)));
        // Each row has groups of 128, 128 and 44 elements.
        let weighted: f64 = a
            .groups
            .mse
            .iter()
            .enumerate()
            .map(|(i, &m)| m as f64 * if i % 3 == 2 { 44.0 } else { 128.0 })
            .sum();
        assert!((weighted / 1800.0 - a.totals.mse).abs() < 1e-6 * a.totals.mse);
    }

    #[test]
    fn refuses_what_cannot_be_quantized() {
        let mut t = tensor(2, 3, 1);
        t.values[[1, 2]] = f32::NAN;
        assert!(matches!(
            analyze(&t, &Recipe::default()),
            Err(Error::NonFinite { nan: 1, inf: 0, first_row: 1, first_col: 2 })
        ));
        let mut inf = tensor(3, 40, 4);
        inf.values[[2, 33]] = f32::NEG_INFINITY;
        assert!(matches!(
            analyze(&inf, &Recipe { granularity: Granularity::Tensor, ..Recipe::default() }),
            Err(Error::NonFinite { nan: 0, inf: 1, first_row: 2, first_col: 33 })
        ));
        let empty = Tensor::from_values("e", DType::F32, Array2::zeros((3, 0)));
        assert!(matches!(analyze(&empty, &Recipe::default()), Err(Error::BadShape { .. })));
        let mut big = tensor(1, 16, 2);
        big.values[[0, 9]] = 3e9;
        assert!(matches!(analyze(&big, &Recipe::default()), Err(Error::ScaleOverflow { row: 0, col: 0, .. })));
        let g = Recipe { granularity: Granularity::Group(8), ..Recipe::default() };
        assert!(matches!(analyze(&big, &g), Err(Error::ScaleOverflow { row: 0, col: 8, .. })));
        assert!(analyze(&t, &Recipe { bits: 12, ..Recipe::default() }).is_err());
        // Codebook levels are stored in f16 (largest 65504, IEEE 754 binary16): a level past it
        // is refused, one below it stays.
        let mut wide = tensor(2, 16, 3);
        wide.values[[1, 4]] = 1e6;
        let row_books = Recipe { format: Format::Codebook, bits: 2, granularity: Granularity::Row, ..Recipe::default() };
        assert!(matches!(analyze(&wide, &row_books), Err(Error::LevelOverflow { row: Some(1), max_abs: 1e6 })));
        let one_book = Recipe { granularity: Granularity::Tensor, ..row_books };
        assert!(matches!(analyze(&wide, &one_book), Err(Error::LevelOverflow { row: None, .. })));
        wide.values[[1, 4]] = 6e4;
        assert!(analyze(&wide, &row_books).unwrap().totals.mse.is_finite());
    }

    #[test]
    fn huge_finite_values_keep_finite_figures() {
        // Squares of 1e20 overflow f32; the sums must fall back to f64.
        let mut t = tensor(2, 64, 5);
        t.values.mapv_inplace(|v| v * 1e20);
        let a = analyze(&t, &Recipe { scale_dtype: ScaleDType::F32, granularity: Granularity::Group(32), ..Recipe::default() }).unwrap();
        assert!(a.totals.sqnr_db.unwrap().is_finite() && a.totals.mse.is_finite());
        let plain = analyze(&tensor(2, 64, 5), &Recipe { scale_dtype: ScaleDType::F32, granularity: Granularity::Group(32), ..Recipe::default() }).unwrap();
        assert!((a.totals.sqnr_db.unwrap() - plain.totals.sqnr_db.unwrap()).abs() < 0.01);
    }

    #[test]
    fn groups_map_back_to_their_elements_and_grids() {
        let t = tensor(3, 300, 6);
        let a = analyze(&t, &Recipe::default()).unwrap();
        assert_eq!(a.group_span(4), Some((1..2, 128..256)));
        assert_eq!(a.group_span(5), Some((1..2, 256..300)));
        assert_eq!(a.group_span(9), None);
        let points = a.grid_points(5);
        assert_eq!(points.len(), 16);
        assert!(points.contains(&0.0), "zero is exact on an asymmetric grid");
        assert!(points.windows(2).all(|w| w[0] < w[1]));
        let mut reported = Vec::new();
        analyze_with(&tensor(130, 8, 1), &Recipe::default(), None, &mut |done, all| reported.push((done, all))).unwrap();
        assert_eq!(reported.last(), Some(&(130, 130)));
        assert!(reported.windows(2).all(|w| w[0].0 < w[1].0));
    }

    #[test]
    fn an_all_zero_tensor_is_exact() {
        let t = Tensor::from_values("z", DType::F16, Array2::zeros((3, 20)));
        let a = analyze(&t, &Recipe { granularity: Granularity::Group(8), ..Recipe::default() }).unwrap();
        assert!(a.totals.exact);
        assert!(a.params.iter().all(|p| p.scale == 1.0));
    }
}
