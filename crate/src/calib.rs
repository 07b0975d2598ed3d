//! Calibration data: what the layer's inputs look like.
//!
//! Either an activation sample X of shape [tokens, cols] (the rows are the inputs x that the
//! layer sees, y = x·Wᵀ), or one statistic per input column: max |x_j| or mean |x_j|. From a
//! sample the core derives both statistics, the second moments E\[x_j²\], and the output error
//! ‖X·Ŵᵀ − X·Wᵀ‖_F / ‖X·Wᵀ‖_F of any reconstruction Ŵ. With statistics only, the output
//! error is estimated from the diagonal: Σ_rj (ŵ_rj − w_rj)²·m_j² / Σ_rj w_rj²·m_j², with m_j
//! the given statistic (our approximation; it ignores correlations between columns).

use crate::error::{Error, Result};
use crate::linalg;
use crate::rows;
use crate::tensor::Tensor;
use ndarray::{s, Array2, ArrayView1, ArrayView2};
use serde::{Deserialize, Serialize};
use std::str::FromStr;
use std::sync::{Arc, Mutex};

/// What a calibration tensor holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum CalibKind {
    /// Activation rows [tokens, cols].
    Sample,
    /// One max |x_j| per input column.
    MaxAbs,
    /// One mean |x_j| per input column.
    MeanAbs,
}

impl FromStr for CalibKind {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "sample" => Ok(CalibKind::Sample),
            "maxabs" => Ok(CalibKind::MaxAbs),
            "meanabs" => Ok(CalibKind::MeanAbs),
            _ => Err(Error::BadCalibration { detail: format!("kind '{s}' is not one of sample, maxabs, meanabs") }),
        }
    }
}

/// Calibration data checked against a weight's input width.
#[derive(Debug)]
pub struct Calibration {
    /// The activation sample [tokens, cols], when one was given.
    pub sample: Option<Array2<f32>>,
    /// max |x_j| per column.
    pub max_abs: Vec<f32>,
    /// mean |x_j| per column.
    pub mean_abs: Vec<f32>,
    /// E\[x_j²\] per column (from the sample; the square of the given statistic otherwise).
    pub mean_sq: Vec<f32>,
    /// Which statistic was given when there is no sample.
    pub kind: CalibKind,
    /// X·Wᵀ of the last weight it was asked for, keyed by a fingerprint of that weight, so that
    /// every recipe tried on one weight shares one product.
    reference: Mutex<Option<(u64, Arc<Array2<f32>>)>>,
}

impl Clone for Calibration {
    fn clone(&self) -> Self {
        Calibration {
            sample: self.sample.clone(),
            max_abs: self.max_abs.clone(),
            mean_abs: self.mean_abs.clone(),
            mean_sq: self.mean_sq.clone(),
            kind: self.kind,
            reference: Mutex::new(None),
        }
    }
}

/// A fingerprint of a weight's shape and every value (FNV-1a over the bit patterns).
fn fingerprint(weight: ArrayView2<f32>) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325 ^ ((weight.nrows() as u64) << 32 | weight.ncols() as u64);
    for v in weight.iter() {
        h = (h ^ u64::from(v.to_bits())).wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

impl Calibration {
    /// Check `tensor` as calibration of `kind` for a weight with `cols` input columns.
    pub fn from_tensor(tensor: &Tensor, kind: CalibKind, cols: usize) -> Result<Self> {
        let bad = |detail: String| Error::BadCalibration { detail };
        if tensor.shape.len() > 2 {
            return Err(bad(format!(
                "it has shape {:?}; give a 2-D sample [tokens, {cols}] (flatten batch and sequence first) or a vector of {cols} statistics",
                tensor.shape
            )));
        }
        if tensor.values.is_empty() {
            return Err(bad(format!("it is empty (shape {:?})", tensor.shape)));
        }
        let scan = tensor.scan();
        let count = scan.non_finite;
        if let Some((row, col)) = count.first {
            return Err(bad(format!(
                "it holds {} NaN and {} infinite values (first at row {row}, column {col})",
                count.nan, count.inf
            )));
        }
        // All zeros would measure every output error as 0 and leave GPTQ's Hessian without a
        // column to trust: nothing can be learnt from such inputs.
        if scan.range == Some((0.0, 0.0)) {
            return Err(bad("every value is 0, so it says nothing of the layer's inputs".into()));
        }
        let width = tensor.cols();
        if width != cols {
            return Err(bad(format!("it has {width} columns but the weight has {cols} input columns")));
        }
        match kind {
            // A vector could be one token or one statistic per column: that is the user's to say.
            CalibKind::Sample if tensor.shape.len() == 1 => Err(bad(format!(
                "a sample has two dimensions [tokens, {cols}], and this is one vector of {cols} values: read it as per-column statistics (max |x| or mean |x|), or save one token as shape [1, {cols}]"
            ))),
            CalibKind::Sample => Ok(Self::from_sample(tensor.values.clone())),
            CalibKind::MaxAbs | CalibKind::MeanAbs => {
                if tensor.rows() != 1 {
                    return Err(bad(format!(
                        "per-column statistics must be one vector of {cols} values, not shape {:?}",
                        tensor.shape
                    )));
                }
                if let Some((lowest, _)) = scan.range.filter(|r| r.0 < 0.0) {
                    return Err(bad(format!("statistics of |x| cannot be negative, and the smallest value is {lowest}")));
                }
                let stat: Vec<f32> = tensor.values.iter().copied().collect();
                Ok(Calibration {
                    sample: None,
                    max_abs: stat.clone(),
                    mean_abs: stat.clone(),
                    mean_sq: stat.iter().map(|m| m * m).collect(),
                    kind,
                    reference: Mutex::new(None),
                })
            }
        }
    }

    /// Calibration from an activation sample (finite, [tokens, cols]).
    pub fn from_sample(sample: Array2<f32>) -> Self {
        let cols = sample.ncols();
        let tokens = sample.nrows().max(1) as f64;
        let mut max_abs = vec![0f32; cols];
        let mut sum_abs = vec![0f64; cols];
        let mut sum_sq = vec![0f64; cols];
        for row in sample.rows() {
            for (j, &x) in row.iter().enumerate() {
                max_abs[j] = max_abs[j].max(x.abs());
                sum_abs[j] += f64::from(x.abs());
                sum_sq[j] += f64::from(x) * f64::from(x);
            }
        }
        Calibration {
            max_abs,
            mean_abs: sum_abs.iter().map(|s| (s / tokens) as f32).collect(),
            mean_sq: sum_sq.iter().map(|s| (s / tokens) as f32).collect(),
            sample: Some(sample),
            kind: CalibKind::Sample,
            reference: Mutex::new(None),
        }
    }

    /// Input columns.
    pub fn cols(&self) -> usize {
        self.max_abs.len()
    }

    /// The reference output X·Wᵀ for a weight, when there is a sample (kept for the next call
    /// with the same weight).
    pub fn reference_output(&self, weight: ArrayView2<f32>) -> Option<Arc<Array2<f32>>> {
        let x = self.sample.as_ref()?;
        let key = fingerprint(weight);
        let mut cache = self.reference.lock().unwrap_or_else(|poisoned| poisoned.into_inner());
        if let Some((cached_key, y)) = cache.as_ref() {
            if *cached_key == key {
                return Some(Arc::clone(y));
            }
        }
        let y = Arc::new(linalg::matmul_transposed(x.view(), weight));
        *cache = Some((key, Arc::clone(&y)));
        Some(y)
    }
}

/// Output error of a reconstruction against the original weight.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OutputError {
    /// ‖X·Ŵᵀ − X·Wᵀ‖_F / ‖X·Wᵀ‖_F (or the diagonal estimate without a sample).
    pub rel_err: f64,
    /// The same per output row (output channel).
    pub per_row: Vec<f32>,
    /// Whether this is the diagonal estimate from per-column statistics.
    pub estimated: bool,
}

/// ‖X·(Ŵ − W)ᵀ‖ relative to ‖X·Wᵀ‖, per tensor and per output row. `reference` is X·Wᵀ when
/// a sample exists (pass it in so that several reconstructions share one product).
pub fn output_error(
    calib: &Calibration,
    weight: ArrayView2<f32>,
    reconstruction: ArrayView2<f32>,
    reference: Option<&Array2<f32>>,
) -> OutputError {
    let blocks = rows::map_blocks(weight.nrows(), |range| {
        let mut sums = RowSums::default();
        sums.add_rows(calib, weight.slice(s![range.clone(), ..]), reconstruction.slice(s![range.clone(), ..]), reference, range.start);
        sums
    });
    let mut sums = RowSums::default();
    blocks.into_iter().for_each(|block| sums.append(block));
    sums.output_error(calib)
}

/// Σ (ŵ_j − w_j)²·E[x_j²] and Σ w_j²·E[x_j²] over columns `first_col..` of one row, added to
/// `err` and `sig` in column order (the diagonal estimate without a sample).
fn add_estimated(calib: &Calibration, first_col: usize, w: ArrayView1<f32>, w_hat: ArrayView1<f32>, err: &mut f64, sig: &mut f64) {
    for ((&a, &b), &m) in w.iter().zip(w_hat.iter()).zip(&calib.mean_sq[first_col..]) {
        let d = f64::from(b) - f64::from(a);
        *err += d * d * f64::from(m);
        *sig += f64::from(a) * f64::from(a) * f64::from(m);
    }
}

/// The sums of squares behind an output error, one of each per output row in row order: the
/// error ‖ŷ_r − y_r‖² and the signal ‖y_r‖² (both weighted by `E[x_j²]` for the diagonal estimate).
/// Rows are independent, so they can be taken one row block at a time as a reconstruction is made.
#[derive(Debug, Default)]
pub(crate) struct RowSums {
    err: Vec<f64>,
    sig: Vec<f64>,
}

impl RowSums {
    /// Add rows `first..` of the weight (`weight` and `reconstruction` hold those rows only).
    /// With a sample, X·Ŵᵀ of the rows is one block of [`linalg::matmul_transposed`], the same
    /// bits as the reference's columns for the same values.
    pub(crate) fn add_rows(
        &mut self,
        calib: &Calibration,
        weight: ArrayView2<f32>,
        reconstruction: ArrayView2<f32>,
        reference: Option<&Array2<f32>>,
        first: usize,
    ) {
        let rows = weight.nrows();
        let start = self.err.len();
        self.err.resize(start + rows, 0.0);
        self.sig.resize(start + rows, 0.0);
        let (err, sig) = (&mut self.err[start..], &mut self.sig[start..]);
        match (&calib.sample, reference) {
            (Some(x), Some(y)) => {
                let y_hat = linalg::matmul_transposed_block(x.view(), reconstruction);
                for (yr, hr) in y.slice(s![.., first..first + rows]).rows().into_iter().zip(y_hat.rows()) {
                    for (r, (&a, &b)) in yr.iter().zip(hr.iter()).enumerate() {
                        let d = f64::from(b) - f64::from(a);
                        err[r] += d * d;
                        sig[r] += f64::from(a) * f64::from(a);
                    }
                }
            }
            _ => {
                for (r, (w, h)) in weight.rows().into_iter().zip(reconstruction.rows()).enumerate() {
                    add_estimated(calib, 0, w, h, &mut err[r], &mut sig[r]);
                }
            }
        }
    }

    /// No rows yet, with room for `rows`.
    pub(crate) fn with_capacity(rows: usize) -> Self {
        RowSums { err: Vec::with_capacity(rows), sig: Vec::with_capacity(rows) }
    }

    /// `rows` rows of zero sums, for the diagonal estimate taken a run at a time
    /// ([`RowSums::add_estimated_run`]).
    pub(crate) fn zeros(rows: usize) -> Self {
        RowSums { err: vec![0.0; rows], sig: vec![0.0; rows] }
    }

    /// Add to row `row` of these sums the diagonal estimate over one run of its columns from
    /// `first_col` on: the same sums, in the same order, as [`RowSums::add_rows`] takes over the
    /// whole row when the runs come in column order.
    pub(crate) fn add_estimated_run(&mut self, calib: &Calibration, row: usize, first_col: usize, w: ArrayView1<f32>, w_hat: ArrayView1<f32>) {
        add_estimated(calib, first_col, w, w_hat, &mut self.err[row], &mut self.sig[row]);
    }

    /// Add the rows that follow.
    pub(crate) fn append(&mut self, next: RowSums) {
        self.err.extend(next.err);
        self.sig.extend(next.sig);
    }

    /// The output error of every row added.
    pub(crate) fn output_error(&self, calib: &Calibration) -> OutputError {
        let ratio = |e: f64, s: f64| if e == 0.0 { 0.0 } else { (e / s).sqrt() };
        OutputError {
            rel_err: ratio(self.err.iter().sum(), self.sig.iter().sum()),
            per_row: self.err.iter().zip(&self.sig).map(|(&e, &s)| ratio(e, s) as f32).collect(),
            estimated: calib.sample.is_none(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tensor::DType;

    fn tensor(values: Vec<f32>, shape: (usize, usize)) -> Tensor {
        Tensor::from_values("x", DType::F32, Array2::from_shape_vec(shape, values).unwrap())
    }

    #[test]
    fn samples_give_column_statistics() {
        let c = Calibration::from_tensor(&tensor(vec![1.0, -2.0, -3.0, 0.0], (2, 2)), CalibKind::Sample, 2).unwrap();
        assert_eq!(c.max_abs, vec![3.0, 2.0]);
        assert_eq!(c.mean_abs, vec![2.0, 1.0]);
        assert_eq!(c.mean_sq, vec![5.0, 2.0]);
    }

    #[test]
    fn bad_calibration_is_explained() {
        let err = |t: &Tensor, kind| Calibration::from_tensor(t, kind, 3).unwrap_err().to_string();
        assert!(err(&tensor(vec![1.0; 4], (2, 2)), CalibKind::Sample).contains("2 columns but the weight has 3"));
        assert!(err(&tensor(vec![1.0, f32::NAN, 1.0], (1, 3)), CalibKind::Sample).contains("1 NaN"));
        assert!(err(&tensor(vec![], (0, 3)), CalibKind::Sample).contains("empty"));
        assert!(err(&tensor(vec![1.0; 6], (2, 3)), CalibKind::MaxAbs).contains("one vector"));
        assert!(err(&tensor(vec![0.0; 6], (2, 3)), CalibKind::Sample).contains("every value is 0"));
        assert!(err(&tensor(vec![0.5, -0.25, 1.0], (1, 3)), CalibKind::MeanAbs).contains("cannot be negative"));
        let mut cube = tensor(vec![1.0; 6], (2, 3));
        cube.shape = vec![1, 2, 3];
        assert!(err(&cube, CalibKind::Sample).contains("flatten batch and sequence"));
        let mut vector = tensor(vec![1.0, 2.0, 3.0], (1, 3));
        vector.shape = vec![3];
        assert!(err(&vector, CalibKind::Sample).contains("read it as per-column statistics"));
        assert!(Calibration::from_tensor(&vector, CalibKind::MaxAbs, 3).is_ok());
    }

    #[test]
    fn output_error_is_zero_for_an_exact_reconstruction_and_relative_otherwise() {
        let x = Array2::from_shape_vec((3, 2), vec![1.0, 0.0, 0.0, 1.0, 1.0, 1.0]).unwrap();
        let c = Calibration::from_sample(x);
        let w = Array2::from_shape_vec((1, 2), vec![1.0f32, 2.0]).unwrap();
        let y = c.reference_output(w.view()).unwrap();
        assert_eq!(output_error(&c, w.view(), w.view(), Some(&y)).rel_err, 0.0);
        assert!(Arc::ptr_eq(&y, &c.reference_output(w.view()).unwrap()), "the product is kept for the same weight");
        let h = Array2::from_shape_vec((1, 2), vec![1.1f32, 2.0]).unwrap();
        // X·wᵀ = [1, 2, 3]; the error is 0.1 on rows 1 and 3: sqrt(0.02 / 14).
        let e = output_error(&c, w.view(), h.view(), Some(&y));
        assert!((e.rel_err - (0.02f64 / 14.0).sqrt()).abs() < 1e-6, "{}", e.rel_err);
        assert!(!e.estimated);
    }
}
