//! Half-quadratic zero points (HQQ; Badri & Shaji, "Half-Quadratic Quantization of Large
//! Machine Learning Models", 2023). Calibration-free: per group, with the scale s fixed by the
//! min/max fit, find a real zero point z that lowers the l_p error ‖x − s·(q − z)‖_p^p (p < 1)
//! with q = clamp(round(x/s + z), 0, 2^b − 1), by half-quadratic splitting:
//!
//! * e ← shrink_p(x − s·(q − z), β), the generalised soft-threshold
//!   shrink_p(v, β) = sign(v)·max(|v| − |v|^(p−1)/β, 0);
//! * z ← mean(q − (x − e)/s), the closed-form minimiser for fixed e;
//! * β ← κ·β.
//!
//! Defaults (from memory of the paper's reference settings): p = 0.7, β₀ = 10, κ = 1.01, at most
//! 20 iterations. Our stopping rule: stop as soon as an iteration does not lower the l_p error,
//! and keep the best zero point seen (the min/max fit's own zero point included), so the result
//! is never worse than round to nearest in l_p error (HQQ rounds x/s + z where round to nearest
//! rounds x/s and adds z; the two agree except on exact ties x/s = k + ½). The zero point is stored in the scale's
//! type (it is no longer an integer), and the bit cost counts it so.

use super::keep::Kept;
use super::{Reconstruction, quantize_groups, MethodFigures, Quantized};
use crate::error::Result;
use crate::grid::{round_half_even_small, GroupParams, IntGrid};
use crate::recipe::Recipe;
use ndarray::ArrayView2;
use serde::Serialize;

/// The l_p exponent.
pub const P: f32 = 0.7;
const BETA0: f32 = 10.0;
const KAPPA: f32 = 1.01;
/// Most iterations per group.
pub const MAX_ITERATIONS: usize = 20;

/// What HQQ reports.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HqqFigures {
    /// The l_p exponent.
    pub p: f32,
    /// Mean iterations run per group.
    pub mean_iterations: f32,
    /// Σ|x − x̂|^p of round to nearest.
    pub lp_before: f64,
    /// Σ|x − x̂|^p after HQQ.
    pub lp_after: f64,
}

/// HQQ's quantize-dequantize of one value with a real zero point.
#[inline]
fn dequantize(p: GroupParams, qmax: f32, v: f32) -> f32 {
    // The grid's own rounding gives +0 where round_ties_even gives −0 (for a zero point of 0
    // and v just below 0): no code of the packed file decodes to −0.
    let q = round_half_even_small(v / p.scale + p.zero).clamp(0.0, qmax);
    (q - p.zero) * p.scale
}

fn lp_error(x: &[f32], p: GroupParams, qmax: f32) -> f64 {
    x.iter().map(|&v| f64::from((v - dequantize(p, qmax, v)).abs()).powf(f64::from(P))).sum()
}

fn shrink(v: f32, beta: f32) -> f32 {
    let a = v.abs();
    if a == 0.0 {
        return 0.0;
    }
    v.signum() * (a - a.powf(P - 1.0) / beta).max(0.0)
}

/// Optimise the zero point of one group; returns its parameters and the iterations run.
pub fn optimise(grid: &IntGrid, x: &[f32], start: GroupParams) -> (GroupParams, usize) {
    let qmax = grid.qmax;
    let store = |z: f32| grid.scale_dtype.round(z.abs()).map_or(z, |m| m.copysign(z));
    let mut best = (lp_error(x, start, qmax), start);
    let mut current = start;
    let mut beta = BETA0;
    let mut iterations = 0;
    let mut e = vec![0f32; x.len()];
    while iterations < MAX_ITERATIONS {
        iterations += 1;
        let s = current.scale;
        let mut z_sum = 0f64;
        for (ei, &v) in e.iter_mut().zip(x) {
            let q = (v / s + current.zero).round_ties_even().clamp(0.0, qmax);
            *ei = shrink(v - (q - current.zero) * s, beta);
            z_sum += f64::from(q - (v - *ei) / s);
        }
        let z = if x.is_empty() { current.zero } else { store((z_sum / x.len() as f64) as f32) };
        current = GroupParams { scale: s, zero: z };
        beta *= KAPPA;
        let err = lp_error(x, current, qmax);
        if err < best.0 {
            best = (err, current);
        } else {
            break;
        }
    }
    (best.1, iterations)
}

/// HQQ on every group of `w` (asymmetric grids only; the recipe check enforces it).
pub fn run(w: ArrayView2<f32>, recipe: &Recipe, kept: &Kept) -> Result<Quantized> {
    let grid = IntGrid::new(recipe);
    let mut grouped = quantize_groups(
        w,
        recipe,
        kept,
        |x, _, _| {
            let start = grid.fit(x)?;
            let before = lp_error_rtn(&grid, x, start);
            let (p, iterations) = optimise(&grid, x, start);
            Ok((p, (before, lp_error(x, p, grid.qmax), iterations)))
        },
        |p, x, out, _| {
            for (o, &v) in out.iter_mut().zip(x) {
                o.write(dequantize(p, grid.qmax, v));
            }
        },
        &(),
        Reconstruction::Keep,
        &mut |_, _| {},
    )?;
    let notes = &grouped.notes;
    Ok(Quantized {
        figures: MethodFigures::Hqq(HqqFigures {
            p: P,
            mean_iterations: notes.iter().map(|n| n.2).sum::<usize>() as f32 / notes.len().max(1) as f32,
            lp_before: notes.iter().map(|n| n.0).sum(),
            lp_after: notes.iter().map(|n| n.1).sum(),
        }),
        ..Quantized::plain(grouped.kept_out(), grouped.params)
    })
}

fn lp_error_rtn(grid: &IntGrid, x: &[f32], p: GroupParams) -> f64 {
    x.iter().map(|&v| f64::from((v - grid.dequantize_one(p, v)).abs()).powf(f64::from(P))).sum()
}
