//! Activation-aware scaling (AWQ; Lin, Tang, Tang, Yang, Chen, Wang, Xiao, Dang, Gan & Han,
//! "AWQ: Activation-aware Weight Quantization for LLM Compression and Acceleration", MLSys 2024).
//!
//! Per-column factors s_j = (mean|x_j|)^α, clamped below at 10⁻⁴ and divided by
//! √(max s · min s) so they centre on 1 (from memory of the paper's reference code), scale the
//! weight before quantization: Ŵ = Q(W·diag(s))·diag(s)⁻¹. α is searched on 0, 0.05, …, 0.95 and
//! the α with the lowest output error on the calibration data is kept; α = 0 gives s = 1, plain
//! round to nearest, so the choice is never worse than that. Optionally a clipping ratio is then
//! searched per group by output-weighted error. Without an activation sample the output error
//! is the diagonal estimate of `calib`.

use super::keep::Kept;
use super::{Reconstruction, clip, quantize_groups, scale_columns, unscale_columns, with_scratch, MethodFigures, Quantized};
use crate::formats::Grid;
use crate::calib::{output_error, Calibration};
use crate::error::Result;
use crate::recipe::{Method, Recipe};
use ndarray::{Array2, ArrayView2};
use serde::Serialize;

/// Points of the α grid: 0, 0.05, …, 0.95, as in the paper's reference search (from memory).
pub const ALPHA_STEPS: usize = 20;

/// What AWQ reports.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AwqFigures {
    /// The chosen strength.
    pub alpha: f32,
    /// (α, output error) over the search grid.
    pub curve: Vec<[f64; 2]>,
    /// Whether a clipping ratio was searched per group afterwards.
    pub clip: bool,
    /// Whether the errors are the diagonal estimate (no activation sample).
    pub estimated: bool,
}

/// The factors for strength `alpha`.
pub fn factors(mean_abs: &[f32], alpha: f32) -> Vec<f32> {
    let raw: Vec<f32> = mean_abs.iter().map(|m| m.powf(alpha).max(1e-4)).collect();
    let (lo, hi) = raw.iter().fold((f32::INFINITY, 0f32), |(lo, hi), &v| (lo.min(v), hi.max(v)));
    let centre = (lo * hi).sqrt();
    raw.iter().map(|v| v / centre).collect()
}

/// A group's values paired with their columns' factors, in pieces that lie within one row: a
/// per-row or grouped recipe's group is one piece, a per-tensor group one piece per row.
fn aligned<'a>(x: &'a [f32], s: &'a [f32], col0: usize, cols: usize) -> impl Iterator<Item = (&'a [f32], &'a [f32])> {
    let first = x.len().min(cols - col0);
    std::iter::once((&x[..first], &s[col0..col0 + first])).chain(x[first..].chunks(cols).map(move |row| (row, &s[..row.len()])))
}

/// AWQ's α search on weight `w`.
pub fn run(
    w: ArrayView2<f32>,
    recipe: &Recipe,
    calib: &Calibration,
    reference: Option<&Array2<f32>>,
    kept: &Kept,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Quantized> {
    let plain = Recipe { method: Method::Rtn, ..*recipe };
    let grid = Grid::new(&plain);
    let cols = w.ncols();
    // Q(W·diag(s))·diag(s)⁻¹ group by group, scaling on the fly instead of copying W per α.
    let candidate = |alpha: f32| -> Result<(Quantized, Vec<f32>)> {
        let s = factors(&calib.mean_abs, alpha);
        let mut grouped = quantize_groups(
            w,
            &plain,
            kept,
            |x, _, col0| {
                with_scratch(|scaled| {
                    scaled.clear();
                    for (xs, fs) in aligned(x, &s, col0, cols) {
                        scaled.extend(xs.iter().zip(fs).map(|(v, f)| v * f));
                    }
                    grid.fit(scaled).map(|p| (p, ()))
                })
            },
            |p, x, out, col0| {
                let mut done = 0;
                for (xs, fs) in aligned(x, &s, col0, cols) {
                    for ((o, &v), &f) in out[done..done + xs.len()].iter_mut().zip(xs).zip(fs) {
                        o.write(grid.dequantize_one(p, v * f) / f);
                    }
                    done += xs.len();
                }
            },
            &(),
            Reconstruction::Keep,
            &mut |_, _| {},
        )?;
        let (mut dequantized, params) = (grouped.kept_out(), grouped.params);
        kept.restore(w, &mut dequantized);
        Ok((Quantized::plain(dequantized, params), s))
    };
    let mut curve = Vec::with_capacity(ALPHA_STEPS);
    let mut best: Option<(f64, f32, Quantized, Vec<f32>)> = None;
    for i in 0..ALPHA_STEPS {
        let alpha = i as f32 / ALPHA_STEPS as f32;
        let (mut q, s) = candidate(alpha)?;
        let measured = output_error(calib, w, q.dequantized.view(), reference);
        let err = measured.rel_err;
        curve.push([f64::from(alpha), err]);
        if best.as_ref().is_none_or(|b| err < b.0) {
            q.output = Some(measured);
            best = Some((err, alpha, q, s));
        }
        progress(i + 1, ALPHA_STEPS);
    }
    let (_, alpha, mut q, s) = best.expect("the grid is not empty");
    if recipe.awq_clip {
        // Clip in the scaled space, where the inputs are x_j / s_j.
        let mut scaled_calib = calib.clone();
        scaled_calib.sample = None;
        scaled_calib.mean_sq = calib.mean_sq.iter().zip(&s).map(|(m, f)| m / (f * f)).collect();
        q = clip::run(scale_columns(w, &s).view(), &plain, Some(&scaled_calib), kept)?;
        unscale_columns(&mut q.dequantized, &s);
        kept.restore(w, &mut q.dequantized);
    }
    q.figures = MethodFigures::Awq(AwqFigures { alpha, curve, clip: recipe.awq_clip, estimated: calib.sample.is_none() });
    q.column_factors = Some(s);
    q.kept = kept.clone();
    Ok(q)
}
