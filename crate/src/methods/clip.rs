//! Clipping search (common practice): per group, shrink the min/max range by ratios
//! 1.00, 0.95, …, 0.50 and keep the ratio with the lowest error — the weight MSE, or, when
//! calibration exists, the output-weighted error Σ_j E\[x_j²\]·(w_j − ŵ_j)², which is the
//! diagonal part of the group's contribution to ‖X·(Ŵ − W)ᵀ‖².

use super::keep::Kept;
use super::{Reconstruction, quantize_groups, with_scratch, MethodFigures, Quantized};
use crate::calib::Calibration;
use crate::error::Result;
use crate::formats::Grid;
use crate::grid::min_max;
use crate::recipe::Recipe;
use ndarray::ArrayView2;

/// The ratios tried, largest first.
pub fn ratios() -> impl Iterator<Item = f32> {
    (0..=10).map(|i| 1.0 - 0.05 * i as f32)
}

/// Clipping search on every group of `w`.
pub fn run(w: ArrayView2<f32>, recipe: &Recipe, calib: Option<&Calibration>, kept: &Kept) -> Result<Quantized> {
    let grid = Grid::new(recipe);
    let cols = w.ncols();
    let weights = calib.map(|c| c.mean_sq.as_slice());
    let mut grouped = quantize_groups(
        w,
        recipe,
        kept,
        |x, _, col0| {
            let (lo, hi) = min_max(x);
            with_scratch(|scratch| {
                let mut best = None;
                for ratio in ratios() {
                    let p = grid.fit_range(lo * ratio, hi * ratio)?;
                    scratch.resize(x.len(), 0.0);
                    grid.quantize_into(p, x, scratch);
                    let err: f64 = x
                        .iter()
                        .zip(scratch.iter())
                        .enumerate()
                        .map(|(j, (&a, &b))| {
                            let d = f64::from(a - b);
                            d * d * weights.map_or(1.0, |m| f64::from(m[(col0 + j) % cols]))
                        })
                        .sum();
                    if best.is_none_or(|(e, _, _)| err < e) {
                        best = Some((err, p, ratio));
                    }
                }
                let (_, p, ratio) = best.expect("at least one ratio");
                Ok((p, ratio))
            })
        },
        |p, x, out, _| grid.write_quantized(p, x, out),
        &(),
        Reconstruction::Keep,
        &mut |_, _| {},
    )?;
    let ratio_sum: f64 = grouped.notes.iter().map(|&r| f64::from(r)).sum();
    Ok(Quantized {
        figures: MethodFigures::Clip {
            mean_ratio: (ratio_sum / grouped.notes.len().max(1) as f64) as f32,
            output_weighted: calib.is_some(),
        },
        ..Quantized::plain(grouped.kept_out(), grouped.params)
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    #[test]
    fn clipping_never_does_worse_than_the_full_range() {
        let mut rng = crate::demo::Rng::new(11);
        let w = Array2::from_shape_fn((8, 256), |_| (rng.normal() * (0.5 * rng.normal()).exp()) as f32);
        let recipe = Recipe { bits: 3, granularity: crate::Granularity::Group(64), ..Recipe::default() };
        let plain = super::super::rtn(w.view(), &recipe, &Kept::default()).unwrap();
        let clipped = run(w.view(), &recipe, None, &Kept::default()).unwrap();
        let mse = |q: &Quantized| (&q.dequantized - &w).mapv(|d| f64::from(d * d)).sum();
        assert!(mse(&clipped) <= mse(&plain));
        assert!(mse(&clipped) < 0.95 * mse(&plain), "heavy tails: clipping should help at 3 bits");
        let MethodFigures::Clip { mean_ratio, .. } = clipped.figures else { panic!() };
        assert!(mean_ratio < 1.0);
    }
}
