//! Smoothing (SmoothQuant; Xiao, Lin, Seznec, Wu, Demouth & Han, ICML 2023): move the
//! difficulty of activation outliers into the weights with per-column factors
//! s_j = max|X_j|^α / max|W_j|^(1−α), so that X·Wᵀ = (X·diag(s)⁻¹)·(W·diag(s))ᵀ exactly while
//! the activations' outlier channels shrink. Columns where max|X_j| or max|W_j| is 0 keep
//! s_j = 1 (the formula would give 0 or ∞ there).
//!
//! The W8A8 study simulates the setting the paper targets: weights int8 symmetric per row,
//! activations int8 symmetric per tensor (static) or per token (dynamic), scales in f32, and
//! reports ‖Ŷ − X·Wᵀ‖_F / ‖X·Wᵀ‖_F with and without smoothing, and across α.

use super::keep::Kept;
use super::{rtn, scale_columns};
use crate::calib::Calibration;
use crate::error::{Error, Result};
use crate::linalg;
use crate::recipe::{Granularity, Recipe, ScaleDType};
use ndarray::{Array2, ArrayView2};
use serde::{Deserialize, Serialize};

/// The SmoothQuant paper's default strength.
pub const DEFAULT_SMOOTHING: f32 = 0.5;

/// How activations are quantized in the W8A8 study.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ActQuant {
    /// One scale for the whole activation sample (static).
    Tensor,
    /// One scale per token (dynamic).
    Token,
}

impl std::str::FromStr for ActQuant {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "tensor" => Ok(ActQuant::Tensor),
            "token" => Ok(ActQuant::Token),
            _ => Err(Error::BadRecipe { detail: format!("activation quantization '{s}' is not 'tensor' or 'token'") }),
        }
    }
}

/// Per-column max |w_j| over the rows of `w`.
pub fn column_max(w: ArrayView2<f32>) -> Vec<f32> {
    let mut max = vec![0f32; w.ncols()];
    for row in w.rows() {
        for (m, v) in max.iter_mut().zip(row) {
            *m = m.max(v.abs());
        }
    }
    max
}

/// The smoothing factors for strength `alpha`.
pub fn factors(w: ArrayView2<f32>, calib: &Calibration, alpha: f32) -> Vec<f32> {
    factors_from(&calib.max_abs, &column_max(w), alpha)
}

fn factors_from(x_max: &[f32], w_max: &[f32], alpha: f32) -> Vec<f32> {
    x_max
        .iter()
        .zip(w_max)
        .map(|(&x, &w)| {
            let s = x.powf(alpha) / w.powf(1.0 - alpha);
            if x > 0.0 && w > 0.0 && s.is_finite() && s > 0.0 { s } else { 1.0 }
        })
        .collect()
}

/// The smoothing study of one weight and activation sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SmoothingStudy {
    /// The strength studied.
    pub alpha: f32,
    /// How activations were quantized.
    pub act: ActQuant,
    /// max |w_j| per column before smoothing.
    pub weight_max_before: Vec<f32>,
    /// max |w'_j| per column after smoothing.
    pub weight_max_after: Vec<f32>,
    /// max |x_j| per column before smoothing.
    pub act_max_before: Vec<f32>,
    /// max |x'_j| per column after smoothing.
    pub act_max_after: Vec<f32>,
    /// W8A8 output error without smoothing.
    pub error_without: f64,
    /// W8A8 output error with smoothing at `alpha`.
    pub error_with: f64,
    /// (α, W8A8 output error) for α = 0, 0.05, …, 1.
    pub curve: Vec<[f64; 2]>,
    /// The α of the curve with the lowest error.
    pub best_alpha: f32,
}

/// The α values of the curve.
pub fn alpha_grid() -> impl Iterator<Item = f32> {
    (0..=20).map(|i| i as f32 / 20.0)
}

/// Run the W8A8 smoothing study.
pub fn study(
    w: ArrayView2<f32>,
    calib: &Calibration,
    alpha: f32,
    act: ActQuant,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<SmoothingStudy> {
    let x = calib.sample.as_ref().ok_or_else(|| Error::BadRecipe {
        detail: "the W8A8 study needs an activation sample [tokens, cols], not only per-column statistics".into(),
    })?;
    let y = calib.reference_output(w).expect("the sample exists");
    let w_max = column_max(w);
    let error_at = |s: Option<&[f32]>| w8a8_error(w, x.view(), s, act, &y);
    let error_without = error_at(None)?;
    let chosen = factors_from(&calib.max_abs, &w_max, alpha);
    let error_with = error_at(Some(&chosen))?;
    let mut curve = Vec::new();
    let steps = alpha_grid().count();
    for (i, a) in alpha_grid().enumerate() {
        curve.push([f64::from(a), error_at(Some(&factors_from(&calib.max_abs, &w_max, a)))?]);
        progress(i + 1, steps);
    }
    let best_alpha = curve.iter().min_by(|a, b| a[1].total_cmp(&b[1])).map_or(alpha, |p| p[0] as f32);
    Ok(SmoothingStudy {
        alpha,
        act,
        weight_max_after: w_max.iter().zip(&chosen).map(|(m, s)| m * s).collect(),
        act_max_after: calib.max_abs.iter().zip(&chosen).map(|(m, s)| m / s).collect(),
        weight_max_before: w_max,
        act_max_before: calib.max_abs.clone(),
        error_without,
        error_with,
        curve,
        best_alpha,
    })
}

fn int8(granularity: Granularity) -> Recipe {
    Recipe { bits: 8, granularity, symmetric: true, scale_dtype: ScaleDType::F32, ..Recipe::default() }
}

/// ‖Q(X')·Q(W')ᵀ − Y‖ / ‖Y‖ with W' = W·diag(s), X' = X·diag(s)⁻¹.
fn w8a8_error(w: ArrayView2<f32>, x: ArrayView2<f32>, s: Option<&[f32]>, act: ActQuant, y: &Array2<f32>) -> Result<f64> {
    let (w_s, x_s) = match s {
        Some(s) => (scale_columns(w, s), scale_columns(x, &s.iter().map(|f| 1.0 / f).collect::<Vec<_>>())),
        None => (w.to_owned(), x.to_owned()),
    };
    let none = Kept::default();
    let qw = rtn(w_s.view(), &int8(Granularity::Row), &none)?.dequantized;
    let act_granularity = if act == ActQuant::Token { Granularity::Row } else { Granularity::Tensor };
    let qx = rtn(x_s.view(), &int8(act_granularity), &none)?.dequantized;
    let y_hat = linalg::matmul_transposed(qx.view(), qw.view());
    let (mut err, mut sig) = (0f64, 0f64);
    for (a, b) in y.iter().zip(y_hat.iter()) {
        err += f64::from(b - a).powi(2);
        sig += f64::from(*a).powi(2);
    }
    Ok(if err == 0.0 { 0.0 } else { (err / sig).sqrt() })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::demo::Rng;

    fn case() -> (Array2<f32>, Calibration) {
        let mut rng = Rng::new(21);
        let w = Array2::from_shape_fn((16, 64), |_| (rng.normal() * 0.05) as f32);
        let mut x = Array2::from_shape_fn((128, 64), |_| rng.normal() as f32);
        for t in 0..128 {
            x[[t, 5]] *= 60.0;
            x[[t, 40]] *= 25.0;
            x[[t, 7]] = 0.0; // a dead channel: no NaN may come of it
        }
        (w, Calibration::from_sample(x))
    }

    /// Source: SmoothQuant paper, eq. (3): Y = (X·diag(s)⁻¹)·(diag(s)·Wᵀ) holds exactly.
    #[test]
    fn smoothing_is_exact_algebra() {
        let (w, calib) = case();
        let x = calib.sample.as_ref().unwrap();
        let s = factors(w.view(), &calib, 0.5);
        assert!(s.iter().all(|v| v.is_finite() && *v > 0.0));
        let w_s = scale_columns(w.view(), &s);
        let x_s = scale_columns(x.view(), &s.iter().map(|f| 1.0 / f).collect::<Vec<_>>());
        let y = linalg::matmul_transposed(x.view(), w.view());
        let y_s = linalg::matmul_transposed(x_s.view(), w_s.view());
        let scale = y.iter().fold(0f32, |m, v| m.max(v.abs()));
        assert!(y.iter().zip(y_s.iter()).all(|(a, b)| (a - b).abs() <= 1e-5 * scale));
    }

    /// Source: SmoothQuant paper, section 4: at α = 0.5 the per-column maxima of the smoothed
    /// activations and weights are equal, both √(max|X_j|·max|W_j|).
    #[test]
    fn at_one_half_the_column_maxima_meet() {
        let (w, calib) = case();
        let study = study(w.view(), &calib, 0.5, ActQuant::Tensor, &mut |_, _| {}).unwrap();
        for j in 0..64 {
            if j == 7 {
                continue;
            }
            let (a, b) = (study.act_max_after[j], study.weight_max_after[j]);
            assert!((a - b).abs() <= 1e-5 * a.max(b), "column {j}: {a} vs {b}");
        }
        assert!(study.error_with < study.error_without, "smoothing helps with strong activation outliers");
        assert!(study.curve.iter().all(|p| p[1].is_finite()));
        assert_eq!(study.curve.len(), 21);
    }
}
