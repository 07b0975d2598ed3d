//! Error figures of a reconstruction x̂ of x, per tensor, per group and per input column.
//!
//! * MSE = Σ(x − x̂)²/n; max absolute error = max |x − x̂|;
//! * SQNR = 10·log10(Σx² / Σ(x − x̂)²) dB (signal-to-quantization-noise ratio; an exact
//!   reconstruction has no finite SQNR and is reported as exact);
//! * relative Frobenius error = ‖x − x̂‖_F / ‖x‖_F.
//!
//! Per input column j of the original weights: max |w_j|, RMS, the RMS of the column's error,
//! and an outlier score max |w_j| / median over columns of max |w| (a score of
//! [`OUTLIER_SCORE`] or more marks an outlier column). Sums run in f32 over short blocks
//! and then in f64, so their relative rounding error stays near 1e-6 at worst.

use crate::simd::{larger, F32x4, LANES};
use serde::Serialize;

/// Columns whose largest magnitude is at least this many times the median column's are marked
/// as outliers (our threshold: "several times larger than the typical column").
pub const OUTLIER_SCORE: f32 = 4.0;

/// Elements summed in f32 before their sums are added to the f64 totals.
const SUM_BLOCK: usize = 256;


fn lane_sum(low: &[f32; 4], high: &[f32; 4]) -> f64 {
    low.iter().chain(high).map(|&v| f64::from(v)).sum()
}

/// Running sums for one set of elements (a group or the whole tensor).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct ErrorSums {
    /// Number of elements.
    pub count: usize,
    /// Σ(x − x̂)².
    pub sum_sq_err: f64,
    /// Σx².
    pub sum_sq: f64,
    /// max |x − x̂|.
    pub max_abs_err: f32,
}

impl ErrorSums {
    /// Add the elements of `x` and their reconstruction `x_hat` (finite values).
    pub fn add(&mut self, x: &[f32], x_hat: &[f32]) {
        self.add_measuring::<false>(x, x_hat, &mut []);
    }

    /// [`ErrorSums::add`], also adding each element to its column's sums (element j to column j):
    /// one pass over the data while it is in cache.
    pub fn add_with_columns(&mut self, x: &[f32], x_hat: &[f32], columns: &mut ColumnBlock, first_col: usize) {
        if first_col.is_multiple_of(8) {
            self.add_measuring::<true>(x, x_hat, &mut columns.octets[first_col / 8..]);
        } else {
            // A run that starts inside an octet (a group width that is not a multiple of eight):
            // the same sums, column by column.
            self.add_measuring::<false>(x, x_hat, &mut []);
            for (c, (&a, &h)) in (first_col..).zip(x.iter().zip(x_hat)) {
                columns.octets[c / 8].add(c % 8, a, a - h);
            }
        }
    }

    #[inline(always)]
    fn add_measuring<const COLUMNS: bool>(&mut self, x: &[f32], x_hat: &[f32], columns: &mut [ColumnOctet]) {
        // Eight f32 lanes (two vectors) over blocks of at most 256 elements; each block's lane
        // sums (32 terms at most) then go into the f64 totals, which keeps the relative
        // rounding error of the sums near 1e-6 at worst.
        for (b, (xb, hb)) in x.chunks(SUM_BLOCK).zip(x_hat.chunks(SUM_BLOCK)).enumerate() {
            let zero = F32x4::splat(0.0);
            let (mut err, mut sig, mut max) = ([zero; 2], [zero; 2], [zero; 2]);
            let at = b * SUM_BLOCK;
            let ((x8, x_rest), (h8, h_rest)) = (xb.as_chunks::<8>(), hb.as_chunks::<8>());
            let whole = xb.len() - x_rest.len();
            // Both halves of eight values: the error and signal lanes, and what a column adds.
            let mut step = |xo: &[f32; 8], ho: &[f32; 8]| {
                let (xs, hs) = (xo.as_chunks::<4>().0, ho.as_chunks::<4>().0);
                let mut seen = [(zero, zero, zero); 2];
                for half in 0..2 {
                    let a = F32x4::load(&xs[half]);
                    let e = a - F32x4::load(&hs[half]);
                    let (e2, a2) = (e * e, a * a);
                    err[half] = err[half] + e2;
                    sig[half] = sig[half] + a2;
                    max[half] = max[half].max(e.abs());
                    seen[half] = (a.abs(), a2, e2);
                }
                seen
            };
            if COLUMNS {
                for ((xo, ho), column) in x8.iter().zip(h8).zip(&mut columns[at / 8..]) {
                    let seen = step(xo, ho);
                    let (m, sq, e) = (column.max_abs.as_chunks_mut::<4>().0, column.sum_sq.as_chunks_mut::<4>().0, column.sum_sq_err.as_chunks_mut::<4>().0);
                    for (half, (abs, a2, e2)) in seen.into_iter().enumerate() {
                        F32x4::load(&m[half]).max(abs).store(&mut m[half]);
                        (F32x4::load(&sq[half]) + a2).store(&mut sq[half]);
                        (F32x4::load(&e[half]) + e2).store(&mut e[half]);
                    }
                }
            } else {
                for (xo, ho) in x8.iter().zip(h8) {
                    step(xo, ho);
                }
            }
            let mut lanes = [err[0].to_array(), err[1].to_array(), sig[0].to_array(), sig[1].to_array()];
            let mut block_max = max[0].max(max[1]).max_lane();
            for (i, (&a, &h)) in x_rest.iter().zip(h_rest).enumerate() {
                let e = a - h;
                let (half, lane) = (i / LANES, i % LANES);
                lanes[half][lane] += e * e;
                lanes[2 + half][lane] += a * a;
                block_max = larger(block_max, e.abs());
                if COLUMNS {
                    let c = at + whole + i;
                    columns[c / 8].add(c % 8, a, e);
                }
            }
            let (block_err, block_sig) = (lane_sum(&lanes[0], &lanes[1]), lane_sum(&lanes[2], &lanes[3]));
            if block_err.is_finite() && block_sig.is_finite() {
                self.sum_sq_err += block_err;
                self.sum_sq += block_sig;
            } else {
                // Squares beyond f32's range (|x| > 1.8e19), or a NaN: redo the block in f64,
                // where a NaN stays NaN for the caller to find.
                for (&a, &b) in xb.iter().zip(hb) {
                    let e = f64::from(a) - f64::from(b);
                    self.sum_sq_err += e * e;
                    self.sum_sq += f64::from(a) * f64::from(a);
                }
            }
            self.max_abs_err = larger(self.max_abs_err, block_max);
        }
        self.count += x.len();
    }

    /// Combine with the sums of another set.
    pub fn merge(&mut self, other: &ErrorSums) {
        self.count += other.count;
        self.sum_sq_err += other.sum_sq_err;
        self.sum_sq += other.sum_sq;
        self.max_abs_err = self.max_abs_err.max(other.max_abs_err);
    }

    /// Mean squared error (0 for no elements).
    pub fn mse(&self) -> f64 {
        if self.count == 0 { 0.0 } else { self.sum_sq_err / self.count as f64 }
    }

    /// Relative Frobenius error (0 when both signal and error are 0).
    pub fn rel_err(&self) -> f64 {
        if self.sum_sq_err == 0.0 { 0.0 } else { (self.sum_sq_err / self.sum_sq).sqrt() }
    }

    /// The finished figures.
    pub fn figures(&self) -> ErrorFigures {
        let exact = self.sum_sq_err == 0.0;
        ErrorFigures {
            mse: self.mse(),
            max_abs_err: self.max_abs_err,
            sqnr_db: (!exact).then(|| 10.0 * (self.sum_sq / self.sum_sq_err).log10()),
            exact,
            rel_fro_err: self.rel_err(),
        }
    }
}

/// Error figures of a whole tensor.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ErrorFigures {
    /// Mean squared error.
    pub mse: f64,
    /// Largest absolute error.
    pub max_abs_err: f32,
    /// SQNR in dB; `None` when the reconstruction is exact.
    pub sqnr_db: Option<f64>,
    /// Whether the reconstruction is exact (no error at all).
    pub exact: bool,
    /// ‖x − x̂‖_F / ‖x‖_F.
    pub rel_fro_err: f64,
}

/// Per-group figures laid out as a [rows × per_row] grid, row-major.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct GroupFigures {
    /// Rows of the grid (1 for a per-tensor recipe).
    pub rows: usize,
    /// Groups in each row of the grid.
    pub per_row: usize,
    /// Elements per group (the last group of a row may be shorter); `None` for per-row and
    /// per-tensor recipes.
    pub group_size: Option<usize>,
    /// MSE of each group.
    pub mse: Vec<f32>,
    /// Largest absolute error of each group.
    pub max_abs_err: Vec<f32>,
    /// Relative error ‖x − x̂‖/‖x‖ of each group.
    pub rel_err: Vec<f32>,
}

impl GroupFigures {
    /// Figures from each group's sums.
    pub fn from_sums(rows: usize, per_row: usize, group_size: Option<usize>, sums: &[ErrorSums]) -> Self {
        GroupFigures {
            rows,
            per_row,
            group_size,
            mse: sums.iter().map(|s| s.mse() as f32).collect(),
            max_abs_err: sums.iter().map(|s| s.max_abs_err).collect(),
            rel_err: sums.iter().map(|s| s.rel_err() as f32).collect(),
        }
    }

    /// No groups yet, with room for `groups`.
    pub fn empty(per_row: usize, group_size: Option<usize>, groups: usize) -> Self {
        GroupFigures {
            rows: 0,
            per_row,
            group_size,
            mse: Vec::with_capacity(groups),
            max_abs_err: Vec::with_capacity(groups),
            rel_err: Vec::with_capacity(groups),
        }
    }

    /// Add the rows of `part`, the grid's next rows.
    pub fn append(&mut self, part: &GroupFigures) {
        self.rows += part.rows;
        self.mse.extend_from_slice(&part.mse);
        self.max_abs_err.extend_from_slice(&part.max_abs_err);
        self.rel_err.extend_from_slice(&part.rel_err);
    }
}

/// The sums of eight adjacent columns, side by side, so that the measuring loop reaches all
/// three through one pointer (a WebAssembly engine has few registers to spare for more).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
struct ColumnOctet {
    max_abs: [f32; 8],
    sum_sq: [f32; 8],
    sum_sq_err: [f32; 8],
}

impl ColumnOctet {
    /// Add element `a` with error `e` to the column in `lane`.
    #[inline(always)]
    fn add(&mut self, lane: usize, a: f32, e: f32) {
        self.max_abs[lane] = larger(self.max_abs[lane], a.abs());
        self.sum_sq[lane] += a * a;
        self.sum_sq_err[lane] += e * e;
    }
}

/// Per-column sums over one block of rows (at most [`crate::rows::ROW_BLOCK`]), taken in f32.
#[derive(Debug, Clone, PartialEq)]
pub struct ColumnBlock {
    rows: usize,
    octets: Vec<ColumnOctet>,
}

impl ColumnBlock {
    /// Empty sums for `cols` columns.
    pub fn new(cols: usize) -> Self {
        ColumnBlock { rows: 0, octets: vec![ColumnOctet::default(); cols.div_ceil(8)] }
    }

    /// Count one more row, once all its groups went through [`ErrorSums::add_with_columns`].
    pub fn end_row(&mut self) {
        self.rows += 1;
    }
}

/// Per-column sums over the rows of a tensor: blocks of rows are summed in f32
/// ([`ColumnBlock`]) and added here in f64, in row order.
#[derive(Debug, Clone, PartialEq)]
pub struct ColumnSums {
    rows: usize,
    cols: usize,
    /// Eight columns at a time, as in a block, so that adding a block is one pass of whole
    /// vectors over both.
    octets: Vec<ColumnOctetTotals>,
}

/// The totals of eight adjacent columns.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
struct ColumnOctetTotals {
    max_abs: [f32; 8],
    sum_sq: [f64; 8],
    sum_sq_err: [f64; 8],
}

impl ColumnSums {
    /// Empty sums for `cols` columns.
    pub fn new(cols: usize) -> Self {
        ColumnSums { rows: 0, cols, octets: vec![ColumnOctetTotals::default(); cols.div_ceil(8)] }
    }

    /// Add the sums of the next block of rows.
    pub fn add_block(&mut self, block: &ColumnBlock) {
        self.rows += block.rows;
        for (total, octet) in self.octets.iter_mut().zip(&block.octets) {
            let (max, seen) = (total.max_abs.as_chunks_mut::<4>().0, octet.max_abs.as_chunks::<4>().0);
            for (max, seen) in max.iter_mut().zip(seen) {
                F32x4::load(max).max(F32x4::load(seen)).store(max);
            }
            for lane in 0..8 {
                total.sum_sq[lane] += f64::from(octet.sum_sq[lane]);
                total.sum_sq_err[lane] += f64::from(octet.sum_sq_err[lane]);
            }
        }
    }

    /// One figure of every column.
    fn each<T>(&self, figure: impl Fn(&ColumnOctetTotals, usize) -> T) -> Vec<T> {
        (0..self.cols).map(|c| figure(&self.octets[c / 8], c % 8)).collect()
    }

    /// The finished figures.
    pub fn figures(&self) -> ColumnFigures {
        let n = self.rows.max(1) as f64;
        let max_abs = self.each(|o, lane| o.max_abs[lane]);
        let mut sorted = max_abs.clone();
        sorted.sort_by(f32::total_cmp);
        let median = sorted.get(sorted.len() / 2).copied().unwrap_or(0.0);
        // A tensor whose typical column is all zero still gets finite scores.
        let typical = if median > 0.0 { median } else { sorted.last().copied().filter(|&m| m > 0.0).unwrap_or(1.0) };
        ColumnFigures {
            rms: self.each(|o, lane| (o.sum_sq[lane] / n).sqrt() as f32),
            err_rms: self.each(|o, lane| (o.sum_sq_err[lane] / n).sqrt() as f32),
            outlier_score: max_abs.iter().map(|m| m / typical).collect(),
            max_abs,
        }
    }
}

/// Per-input-column figures of the original weights and of the error.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ColumnFigures {
    /// max |w| of each column.
    pub max_abs: Vec<f32>,
    /// RMS of each column.
    pub rms: Vec<f32>,
    /// RMS of each column's quantization error.
    pub err_rms: Vec<f32>,
    /// max |w_j| / median column max |w|.
    pub outlier_score: Vec<f32>,
}

impl ColumnFigures {
    /// Outlier columns (score ≥ [`OUTLIER_SCORE`]), largest score first.
    pub fn outliers(&self) -> Vec<usize> {
        let mut cols: Vec<usize> = (0..self.outlier_score.len()).filter(|&j| self.outlier_score[j] >= OUTLIER_SCORE).collect();
        cols.sort_by(|&a, &b| self.outlier_score[b].total_cmp(&self.outlier_score[a]));
        cols
    }
}

/// Counts of values in equal-width bins over [lo, hi].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Histogram {
    /// Left edge of the first bin.
    pub lo: f32,
    /// Right edge of the last bin.
    pub hi: f32,
    /// Count in each bin.
    pub counts: Vec<u32>,
}

impl Histogram {
    /// Bin finite values into `bins` equal bins spanning their range.
    pub fn of<'a>(values: impl Iterator<Item = &'a f32> + Clone, bins: usize) -> Self {
        let bins = bins.max(1);
        let (lo, hi) = values.clone().filter(|v| v.is_finite()).fold((f32::INFINITY, f32::NEG_INFINITY), |(lo, hi), &v| (lo.min(v), hi.max(v)));
        if lo > hi {
            return Histogram { lo: 0.0, hi: 0.0, counts: vec![0; bins] };
        }
        let width = f64::from(hi) - f64::from(lo);
        let mut counts = vec![0u32; bins];
        for &v in values.filter(|v| v.is_finite()) {
            let at = if width > 0.0 { ((f64::from(v) - f64::from(lo)) / width * bins as f64) as usize } else { 0 };
            counts[at.min(bins - 1)] += 1;
        }
        Histogram { lo, hi, counts }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sums_match_the_definitions_for_odd_lengths() {
        for len in [0usize, 1, 3, 4, 5, 13] {
            let x: Vec<f32> = (0..len).map(|i| i as f32 - 2.0).collect();
            let h: Vec<f32> = x.iter().map(|v| v + 0.5).collect();
            let mut s = ErrorSums::default();
            s.add(&x, &h);
            let sig: f64 = x.iter().map(|&v| f64::from(v).powi(2)).sum();
            assert_eq!(s.count, len);
            assert_eq!(s.sum_sq_err, 0.25 * len as f64);
            assert_eq!(s.sum_sq, sig);
            assert_eq!(s.max_abs_err, if len == 0 { 0.0 } else { 0.5 });
        }
    }

    #[test]
    fn exact_reconstruction_is_reported_as_exact() {
        let mut s = ErrorSums::default();
        s.add(&[1.0, -2.0], &[1.0, -2.0]);
        let f = s.figures();
        assert!(f.exact && f.sqnr_db.is_none() && f.rel_fro_err == 0.0 && f.mse == 0.0);
        let mut zero = ErrorSums::default();
        zero.add(&[0.0; 3], &[0.0; 3]);
        assert!(zero.figures().exact && zero.figures().rel_fro_err == 0.0);
    }

    #[test]
    fn sqnr_of_a_tenth_amplitude_error_is_20_db() {
        let mut s = ErrorSums::default();
        s.add(&[1.0, -1.0, 1.0, -1.0], &[0.9, -0.9, 0.9, -0.9]);
        let f = s.figures();
        assert!((f.sqnr_db.unwrap() - 20.0).abs() < 1e-5);
        assert!((f.rel_fro_err - 0.1).abs() < 1e-6);
    }

    #[test]
    fn columns_score_outliers_against_the_median() {
        let mut block = ColumnBlock::new(5);
        let mut sums = ErrorSums::default();
        // Row one in two groups (columns 0–2 and 3–4), row two in one.
        sums.add_with_columns(&[1.0, 1.0, 10.0], &[1.0, 1.0, 9.0], &mut block, 0);
        sums.add_with_columns(&[-1.0, 1.0], &[-1.0, 1.0], &mut block, 3);
        block.end_row();
        sums.add_with_columns(&[-1.0, 0.5, 2.0, 1.0, 0.0], &[-1.0, 0.5, 2.0, 1.0, 0.0], &mut block, 0);
        block.end_row();
        assert_eq!(sums.count, 10);
        let mut all = ColumnSums::new(5);
        all.add_block(&block);
        let f = all.figures();
        assert_eq!(f.max_abs, vec![1.0, 1.0, 10.0, 1.0, 1.0]);
        assert_eq!(f.outlier_score[2], 10.0);
        assert_eq!(f.outliers(), vec![2]);
        assert!((f.err_rms[2] - (0.5f32).sqrt()).abs() < 1e-6);
        assert_eq!(ColumnSums::new(3).figures().outlier_score, vec![0.0; 3]);
    }

    /// Column sums do not depend on how a row is cut into runs: runs that start inside an octet
    /// of columns take the column-by-column path, runs of whole octets the four-lane one.
    #[test]
    fn column_sums_are_the_same_for_any_cut_of_the_rows() {
        let cols = 45;
        let rows: Vec<Vec<f32>> = (0..3).map(|r| (0..cols).map(|c| ((r * cols + c) as f32 * 0.37).sin()).collect()).collect();
        let figures = |width: usize| {
            let (mut block, mut sums) = (ColumnBlock::new(cols), ErrorSums::default());
            for row in &rows {
                let rounded: Vec<f32> = row.iter().map(|v| (v * 8.0).round() / 8.0).collect();
                for start in (0..cols).step_by(width) {
                    let end = (start + width).min(cols);
                    sums.add_with_columns(&row[start..end], &rounded[start..end], &mut block, start);
                }
                block.end_row();
            }
            let mut all = ColumnSums::new(cols);
            all.add_block(&block);
            all.figures()
        };
        let whole = figures(cols);
        for width in [1, 5, 8, 12, 16, 44] {
            assert_eq!(figures(width), whole, "runs of {width}");
        }
    }

    /// Blocks added one after another give each column's largest magnitude exactly and its RMS
    /// and error RMS as computed directly (to f32 rounding), for widths of 0, 1, under, at and
    /// across an octet of columns.
    #[test]
    fn column_sums_over_blocks_match_a_direct_computation_for_odd_widths() {
        for cols in [0usize, 1, 7, 8, 9, 45, 1025] {
            let value = |r: usize, c: usize| ((r * 31 + c * 7) as f32 * 0.61).sin() * 3.0;
            let mut all = ColumnSums::new(cols);
            for b in 0..3 {
                let mut block = ColumnBlock::new(cols);
                for r in 2 * b..2 * b + 2 {
                    let row: Vec<f32> = (0..cols).map(|c| value(r, c)).collect();
                    let rounded: Vec<f32> = row.iter().map(|v| v.round()).collect();
                    ErrorSums::default().add_with_columns(&row, &rounded, &mut block, 0);
                    block.end_row();
                }
                all.add_block(&block);
            }
            let f = all.figures();
            assert_eq!(f.max_abs.len(), cols);
            for c in 0..cols {
                let column: Vec<f64> = (0..6).map(|r| f64::from(value(r, c))).collect();
                let rms = (column.iter().map(|v| v * v).sum::<f64>() / 6.0).sqrt();
                let err_rms = (column.iter().map(|v| (v - v.round()).powi(2)).sum::<f64>() / 6.0).sqrt();
                assert_eq!(f64::from(f.max_abs[c]), column.iter().fold(0f64, |m, v| m.max(v.abs())), "{cols} columns, column {c}");
                assert!((f64::from(f.rms[c]) - rms).abs() <= 1e-6 * rms, "{cols} columns, column {c}");
                assert!((f64::from(f.err_rms[c]) - err_rms).abs() <= 1e-6 * err_rms.max(1e-30), "{cols} columns, column {c}");
            }
        }
    }

    #[test]
    fn histograms_count_every_finite_value_once() {
        let values = [0.0f32, 1.0, 2.0, 3.0, 4.0, f32::NAN];
        let h = Histogram::of(values.iter(), 4);
        assert_eq!((h.lo, h.hi, h.counts.clone()), (0.0, 4.0, vec![1, 1, 1, 2]));
        assert_eq!(Histogram::of([5.0f32; 3].iter(), 2).counts, vec![3, 0]);
        assert_eq!(Histogram::of([].iter(), 3).counts, vec![0, 0, 0]);
    }
}
