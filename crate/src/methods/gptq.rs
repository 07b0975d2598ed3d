//! Error-compensating rounding (GPTQ; Frantar, Ashkboos, Hoefler & Alistarh, "GPTQ: Accurate
//! Post-Training Quantization for Generative Pre-trained Transformers", ICLR 2023).
//!
//! With H = 2·XᵀX/n (n calibration tokens), dampened by λ = damp·mean(diag H) on the diagonal,
//! and U the upper Cholesky factor of H⁻¹ (Uᵀ·U = H⁻¹), columns q are quantized in turn; each
//! column's error δ = w_q − ŵ_q, divided by U_qq, is spread onto the columns not yet quantized
//! along row q of U. Updates inside a block of 128 columns are applied at once; the rest of the
//! weight receives the block's errors as one matrix product (the paper's lazy batch updates).
//! The per-row sum of δ²/U_qq² (δ²/[H⁻¹]_qq at step q) equals (w − ŵ)·H·(w − ŵ)ᵀ.
//!
//! Our conventions, as the paper leaves them open:
//! * columns with diag(H) = 0 never see any input: their weights are set to 0 and
//!   H_jj to 1 (as the paper's reference code does);
//! * per-tensor and per-row scales are fitted once, before the sweep;
//! * groups of g consecutive columns are fitted from the already-updated weights when the sweep
//!   reaches a group's first column (blocks are then made a multiple of g); with activation
//!   order, columns are processed by decreasing diag(H) and, since a group's columns are then no
//!   longer reached together, all group scales are fitted before the sweep ("static" groups), so
//!   the groups stay consecutive columns and cost nothing extra to store.

use super::keep::Kept;
use super::{group_width, MethodFigures, Quantized};
use crate::calib::Calibration;
use crate::error::{Error, Result};
use crate::formats::Grid;
use crate::grid::{min_max, GroupParams, ScaleOverflow};
use crate::linalg;
use crate::recipe::{Granularity, Recipe};
use crate::rows;
use half::f16;
use ndarray::{s, Array2, ArrayView2};
use serde::Serialize;

/// Columns per lazy-update block (the paper's choice).
pub const BLOCK: usize = 128;

/// Rows swept together: a whole number of row blocks, large enough for efficient matrix products.
const CHUNK_ROWS: usize = 4 * rows::ROW_BLOCK;

/// What GPTQ reports.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct GptqFigures {
    /// Dampening fraction used.
    pub damp: f32,
    /// Whether columns went in order of decreasing diag(H).
    pub act_order: bool,
    /// Columns with no calibration input (diag(H) = 0).
    pub dead_columns: usize,
    /// Σ over rows of Σ_q δ²/[H⁻¹]_qq, the quadratic loss GPTQ accumulated.
    pub quadratic_loss: f64,
    /// The same per row.
    #[serde(skip)]
    pub row_losses: Vec<f64>,
}

/// The Hessian H = 2·X'ᵀX'/n of the (optionally smoothed, X' = X·diag(s)⁻¹) sample.
pub fn hessian(sample: ArrayView2<f32>, column_factors: Option<&[f32]>) -> Array2<f32> {
    let n = sample.nrows().max(1) as f32;
    let mut h = linalg::gram(sample, 2.0 / n);
    if let Some(s) = column_factors {
        for ((i, j), v) in h.indexed_iter_mut() {
            *v /= s[i] * s[j];
        }
    }
    h
}

/// Square matrices of the input width that GPTQ holds at once at its peak: the Hessian (factorised
/// in place) and the upper factor of H⁻¹ (see [`linalg::inverse_cholesky_upper`]).
pub const PEAK_SQUARE_MATRICES: usize = 2;

/// Refuse a weight whose input width makes one of GPTQ's square matrices more than this build can
/// ever allocate (`isize::MAX` bytes: 2 GiB in WebAssembly), before any is allocated: the
/// allocation itself would end the process (a weight of 200 000 input columns asks for 160 GB
/// per matrix). Whether they fit the memory at hand is [`crate::footprint`]'s to say, for the
/// caller who knows that memory.
pub(crate) fn check_width((rows, cols): (usize, usize)) -> Result<()> {
    let matrix = (cols as f64).powi(2) * 4.0;
    if matrix <= isize::MAX as f64 {
        return Ok(());
    }
    let gib = |b: f64| b / f64::from(1u32 << 30);
    Err(Error::BadShape {
        shape: vec![rows, cols],
        detail: format!(
            "GPTQ on {cols} input columns holds {PEAK_SQUARE_MATRICES} matrices of {cols} × {cols} values, {:.1} GiB, and one of them is more than this build can address ({:.1} GiB); use another method",
            gib(matrix * PEAK_SQUARE_MATRICES as f64),
            gib(isize::MAX as f64)
        ),
    })
}

/// GPTQ on weight `w` with the recipe's grid.
pub fn run(
    w: ArrayView2<f32>,
    recipe: &Recipe,
    calib: &Calibration,
    column_factors: Option<&[f32]>,
    kept: &Kept,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Quantized> {
    let sample = calib.sample.as_ref().expect("checked by the caller");
    check_width(w.dim())?;
    let h = hessian(sample.view(), column_factors);
    let (q, figures, params) = quantize(w, h, recipe, kept, progress)?;
    Ok(Quantized { figures: MethodFigures::Gptq(figures), ..Quantized::plain(q, params) })
}

/// GPTQ with a given Hessian (before dampening); returns Ŵ, the figures and the group params.
pub fn quantize(
    w: ArrayView2<f32>,
    mut h: Array2<f32>,
    recipe: &Recipe,
    kept: &Kept,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<(Array2<f32>, GptqFigures, Vec<GroupParams>)> {
    let (rows, cols) = w.dim();
    let grid = Grid::new(recipe);
    let mut work = w.to_owned();
    let mut dead_columns = 0;
    for j in 0..cols {
        if h[[j, j]] == 0.0 {
            h[[j, j]] = 1.0;
            work.column_mut(j).fill(0.0);
            dead_columns += 1;
        }
    }
    let mean_diag = (0..cols).map(|j| f64::from(h[[j, j]])).sum::<f64>() / cols.max(1) as f64;
    let lambda = (f64::from(recipe.damp) * mean_diag) as f32;
    for j in 0..cols {
        h[[j, j]] += lambda;
    }

    // Processing order: perm[position] = original column.
    let mut perm: Vec<usize> = (0..cols).collect();
    if recipe.act_order {
        perm.sort_by(|&a, &b| h[[b, b]].total_cmp(&h[[a, a]]).then(a.cmp(&b)));
        work = Array2::from_shape_fn((rows, cols), |(r, c)| work[[r, perm[c]]]);
        h = Array2::from_shape_fn((cols, cols), |(i, j)| h[[perm[i], perm[j]]]);
    }
    let u = linalg::inverse_cholesky_upper(h)?;

    let width = group_width(recipe.granularity, cols);
    let per_row = recipe.granularity.groups_per_row(cols);
    let dynamic_groups = matches!(recipe.granularity, Granularity::Group(_)) && !recipe.act_order;
    let block = if dynamic_groups { width * BLOCK.div_ceil(width) } else { BLOCK };
    let overflow = |row: usize, col: usize| move |e: ScaleOverflow| e.at(recipe.scale_dtype, row, col);
    // Kept values are left out of every fit, as in the other methods.
    let fit_values = |values: &mut Vec<f32>, r: usize, cols_in_order: &mut dyn Iterator<Item = (usize, f32)>| {
        values.clear();
        values.extend(cols_in_order.map(|(c, v)| if kept.contains(c, r * cols + c) { 0.0 } else { v }));
    };
    let mut scratch = Vec::new();
    let mut params = match recipe.granularity {
        Granularity::Tensor => {
            let (mut lo, mut hi) = (0f32, 0f32);
            for r in 0..rows {
                fit_values(&mut scratch, r, &mut (0..cols).map(|c| (perm[c], work[[r, c]])));
                let (l, h) = min_max(&scratch);
                (lo, hi) = (lo.min(l), hi.max(h));
            }
            vec![grid.fit_range(lo, hi).map_err(overflow(0, 0))?]
        }
        _ if dynamic_groups => vec![GroupParams { scale: 1.0, zero: 0.0 }; rows * per_row],
        _ => {
            // Per row, or static groups: fit every group now, in original column order.
            let mut original = vec![0f32; cols];
            let mut all = Vec::with_capacity(rows * per_row);
            for r in 0..rows {
                for c in 0..cols {
                    original[perm[c]] = work[[r, c]];
                }
                for k in 0..per_row {
                    let span = k * width..((k + 1) * width).min(cols);
                    fit_values(&mut scratch, r, &mut span.clone().map(|c| (c, original[c])));
                    all.push(grid.fit(&scratch).map_err(overflow(r, span.start))?);
                }
            }
            all
        }
    };
    let param_index = |r: usize, c: usize| match recipe.granularity {
        Granularity::Tensor => 0,
        _ => r * per_row + c / width,
    };

    let mut out = Array2::<f32>::zeros((rows, cols));
    let any_kept = !kept.is_empty();
    let work = &work;
    // Rows evolve independently once U is known, so chunks of rows are swept in parallel; each
    // chunk is a fresh copy, so the matrix products see the same shapes and alignment however
    // many threads there are, and the result is the same bit for bit.
    let chunks = rows::map_chunks_mut_advancing(out.as_slice_mut().expect("fresh array"), cols, CHUNK_ROWS, progress, |first, out_chunk, advance| {
        let chunk_rows = out_chunk.len() / cols;
        let mut work = work.slice(s![first..first + chunk_rows, ..]).to_owned();
        let mut chunk_params = if dynamic_groups { vec![GroupParams { scale: 1.0, zero: 0.0 }; chunk_rows * per_row] } else { Vec::new() };
        let mut row_losses = vec![0f64; chunk_rows];
        let mut scratch = Vec::new();
        let mut i1 = 0;
        while i1 < cols {
            let i2 = (i1 + block).min(cols);
            let count = i2 - i1;
            let mut w1 = work.slice(s![.., i1..i2]).to_owned();
            let mut err1 = Array2::<f32>::zeros((chunk_rows, count));
            let u_block = u.slice(s![i1..i2, i1..i2]);
            // Inside a block each row evolves on its own (an update touches only its own row),
            // so rows are swept one at a time while their 128 values stay in cache.
            for (i_row, (mut w_row, mut e_row)) in w1.rows_mut().into_iter().zip(err1.rows_mut()).enumerate() {
                let r = first + i_row;
                let w_row = w_row.as_slice_mut().expect("row-major");
                let e_row = e_row.as_slice_mut().expect("row-major");
                let out_row = &mut out_chunk[i_row * cols..(i_row + 1) * cols];
                let mut loss = 0f64;
                for i in 0..count {
                    let orig = perm[i1 + i];
                    if dynamic_groups && orig.is_multiple_of(width) {
                        let end = (i + width).min(count);
                        fit_values(&mut scratch, r, &mut (i..end).map(|j| (orig + j - i, w_row[j])));
                        chunk_params[i_row * per_row + orig / width] = grid.fit(&scratch).map_err(overflow(r, orig))?;
                    }
                    let p = if dynamic_groups { chunk_params[i_row * per_row + orig / width] } else { params[param_index(r, orig)] };
                    let value = w_row[i];
                    let q = if any_kept && kept.contains(orig, r * cols + orig) {
                        f16::from_f32(value).to_f32()
                    } else {
                        grid.dequantize_one(p, value)
                    };
                    out_row[orig] = q;
                    let u_row = u_block.row(i);
                    let u_row = u_row.as_slice().expect("row-major");
                    let e = (value - q) / u_row[i];
                    loss += f64::from(e) * f64::from(e);
                    e_row[i] = e;
                    for (target, &uv) in w_row[i + 1..].iter_mut().zip(&u_row[i + 1..]) {
                        *target -= e * uv;
                    }
                }
                row_losses[i_row] += loss;
            }
            if i2 < cols {
                linalg::subtract_product(work.slice_mut(s![.., i2..]), err1.view(), u.slice(s![i1..i2, i2..]));
            }
            // The chunk's rows count as done in proportion to the columns swept.
            advance(chunk_rows * i2 / cols - chunk_rows * i1 / cols);
            i1 = i2;
        }
        Ok::<_, Error>((row_losses, chunk_params))
    });
    let mut row_losses = Vec::with_capacity(rows);
    let mut dynamic_params = Vec::new();
    for chunk in chunks {
        let (losses, chunk_params) = chunk?;
        row_losses.extend(losses);
        dynamic_params.extend(chunk_params);
    }
    if dynamic_groups {
        params = dynamic_params;
    }
    let figures = GptqFigures {
        damp: recipe.damp,
        act_order: recipe.act_order,
        dead_columns,
        quadratic_loss: row_losses.iter().sum(),
        row_losses,
    };
    Ok((out, figures, params))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::demo::Rng;

    /// A width whose square matrix this build cannot address is refused before allocating.
    #[test]
    fn too_wide_for_this_build_is_refused_before_allocating() {
        assert!(check_width((2, 40_000)).is_ok(), "6.0 GiB per matrix: the memory at hand decides");
        let message = check_width((2, 1 << 40)).unwrap_err().to_string();
        assert!(message.contains("more than this build can address"), "{message}");
    }

    fn weight(rows: usize, cols: usize, seed: u64) -> Array2<f32> {
        let mut rng = Rng::new(seed);
        Array2::from_shape_fn((rows, cols), |_| (rng.normal() * 0.05) as f32)
    }

    /// Source: with H = I there is nothing to compensate (U = I, every off-diagonal update is
    /// zero), so GPTQ is exactly round to nearest (GPTQ paper, section 3).
    #[test]
    fn identity_hessian_without_dampening_is_round_to_nearest() {
        for granularity in [Granularity::Group(32), Granularity::Group(48), Granularity::Row, Granularity::Tensor] {
            for act_order in [false, true] {
                let w = weight(5, 200, 3);
                let recipe = Recipe { granularity, damp: 0.0, act_order, ..Recipe::default() };
                let (q, figures, _) = quantize(w.view(), Array2::eye(200), &recipe, &Kept::default(), &mut |_, _| {}).unwrap();
                let rtn = super::super::rtn(w.view(), &recipe, &Kept::default()).unwrap();
                assert!(q == rtn.dequantized, "{granularity:?} act_order {act_order}");
                assert_eq!(figures.dead_columns, 0);
            }
        }
    }

    /// Source: the quadratic-loss identity behind the method (the optimal brain surgeon update,
    /// which GPTQ applies column by column): Σ_q δ_q²/[H⁻¹]_qq = (w − ŵ)·H·(w − ŵ)ᵀ.
    #[test]
    fn accumulated_losses_equal_the_quadratic_form() {
        let (rows, cols, tokens) = (6, 300, 400);
        let mut rng = Rng::new(9);
        let latent = Array2::from_shape_fn((tokens, 8), |_| rng.normal() as f32);
        let mix = Array2::from_shape_fn((8, cols), |_| rng.normal() as f32);
        let x = latent.dot(&mix) + Array2::from_shape_fn((tokens, cols), |_| 0.3 * rng.normal() as f32);
        let w = weight(rows, cols, 4);
        for (granularity, act_order) in [(Granularity::Group(64), false), (Granularity::Group(64), true), (Granularity::Row, false)] {
            let recipe = Recipe { granularity, act_order, bits: 3, ..Recipe::default() };
            let h = hessian(x.view(), None);
            let mut damped = h.clone();
            let mean = (0..cols).map(|j| f64::from(h[[j, j]])).sum::<f64>() / cols as f64;
            for j in 0..cols {
                damped[[j, j]] += (0.01 * mean) as f32;
            }
            let (q, figures, _) = quantize(w.view(), h, &recipe, &Kept::default(), &mut |_, _| {}).unwrap();
            for r in 0..rows {
                let delta: Vec<f64> = (0..cols).map(|c| f64::from(w[[r, c]]) - f64::from(q[[r, c]])).collect();
                let form: f64 = (0..cols)
                    .map(|i| delta[i] * (0..cols).map(|j| f64::from(damped[[i, j]]) * delta[j]).sum::<f64>())
                    .sum();
                let got = figures.row_losses[r];
                assert!((got - form).abs() <= 2e-3 * form, "row {r}: accumulated {got} vs quadratic form {form} ({granularity:?}, act_order {act_order})");
            }
        }
    }

    #[test]
    fn dead_columns_are_zeroed_and_a_singular_hessian_is_explained() {
        let w = weight(3, 16, 5);
        let mut h = Array2::<f32>::eye(16);
        h[[4, 4]] = 0.0;
        let recipe = Recipe { granularity: Granularity::Group(8), damp: 0.0, ..Recipe::default() };
        let (q, figures, _) = quantize(w.view(), h, &recipe, &Kept::default(), &mut |_, _| {}).unwrap();
        assert_eq!(figures.dead_columns, 1);
        assert!(q.column(4).iter().all(|&v| v == 0.0));
        let mut singular = Array2::<f32>::eye(16);
        singular[[1, 2]] = 2.0;
        singular[[2, 1]] = 2.0;
        let err = quantize(w.view(), singular, &recipe, &Kept::default(), &mut |_, _| {}).unwrap_err();
        assert!(err.to_string().contains("raise the dampening"), "{err}");
    }
}
