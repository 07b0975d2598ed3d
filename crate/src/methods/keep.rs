//! Keeping a few values in 16-bit and quantizing the rest.
//!
//! Either the k most important input columns — ranked by activation scale max |x_j| when
//! calibration exists, else by max |w_j| — or the top fraction of individual weights by |w|.
//! The AWQ paper reports that protecting 0.1–1 % of salient channels recovers most of the
//! quantization loss. Kept values are stored as f16 (IEEE binary16, round to nearest even) and
//! are left out of the group fits, so they no longer stretch a group's range. Their cost
//! (value and index) is counted in `cost`.

use crate::calib::Calibration;
use crate::recipe::Recipe;
use half::f16;
use ndarray::{Array2, ArrayView2};

/// Which values stay in 16-bit.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Kept {
    /// Kept input columns, ascending.
    pub columns: Vec<usize>,
    /// Kept single weights as row-major flat indices, ascending.
    pub elements: Vec<usize>,
}

/// How many single weights a fraction keeps out of `n`.
pub fn kept_count(fraction: f32, n: u64) -> u64 {
    ((f64::from(fraction) * n as f64).round() as u64).min(n)
}

impl Kept {
    /// Choose the kept values of `w` for `recipe`.
    pub fn choose(w: ArrayView2<f32>, recipe: &Recipe, calib: Option<&Calibration>) -> Self {
        let (rows, cols) = w.dim();
        if recipe.keep_cols > 0 {
            let importance: Vec<f32> = match calib {
                Some(c) => c.max_abs.clone(),
                None => (0..cols).map(|j| w.column(j).iter().fold(0f32, |m, v| m.max(v.abs()))).collect(),
            };
            let mut order: Vec<usize> = (0..cols).collect();
            order.sort_by(|&a, &b| importance[b].total_cmp(&importance[a]).then(a.cmp(&b)));
            let mut columns: Vec<usize> = order.into_iter().take(recipe.keep_cols.min(cols)).collect();
            columns.sort_unstable();
            return Kept { columns, elements: Vec::new() };
        }
        let count = kept_count(recipe.keep_frac, (rows * cols) as u64) as usize;
        if count == 0 {
            return Kept::default();
        }
        let values: Vec<f32> = w.iter().copied().collect();
        let mut order: Vec<usize> = (0..values.len()).collect();
        let magnitude = |i: usize| values[i].abs();
        order.select_nth_unstable_by(count - 1, |&a, &b| magnitude(b).total_cmp(&magnitude(a)).then(a.cmp(&b)));
        let mut elements = order[..count].to_vec();
        elements.sort_unstable();
        Kept { columns: Vec::new(), elements }
    }

    /// Whether nothing is kept.
    pub fn is_empty(&self) -> bool {
        self.columns.is_empty() && self.elements.is_empty()
    }

    /// A copy of `w` with the kept values set to 0 (which every grid holds exactly, so they
    /// neither stretch a range nor cost error there), or `None` when nothing is kept.
    pub fn masked(&self, w: ArrayView2<f32>) -> Option<Array2<f32>> {
        if self.is_empty() {
            return None;
        }
        let mut m = w.to_owned();
        self.for_each(m.ncols(), m.nrows(), |r, c| m[[r, c]] = 0.0);
        Some(m)
    }

    /// Put the kept values, rounded to f16, into the reconstruction.
    pub fn restore(&self, w: ArrayView2<f32>, out: &mut Array2<f32>) {
        self.for_each(w.ncols(), w.nrows(), |r, c| out[[r, c]] = f16::from_f32(w[[r, c]]).to_f32());
    }

    /// Whether (r, c) is kept; `index` is the row-major flat index.
    pub fn contains(&self, c: usize, index: usize) -> bool {
        self.columns.binary_search(&c).is_ok() || self.elements.binary_search(&index).is_ok()
    }

    fn for_each(&self, cols: usize, rows: usize, mut f: impl FnMut(usize, usize)) {
        for &c in &self.columns {
            for r in 0..rows {
                f(r, c);
            }
        }
        for &i in &self.elements {
            f(i / cols, i % cols);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keeps_the_largest_weights_or_the_loudest_columns() {
        let w = Array2::from_shape_vec((2, 4), vec![0.1f32, -5.0, 0.2, 0.3, 0.4, 0.1, -0.9, 7.0]).unwrap();
        let recipe = Recipe { keep_frac: 0.25, ..Recipe::default() };
        let kept = Kept::choose(w.view(), &recipe, None);
        assert_eq!(kept.elements, vec![1, 7]);
        let by_weight = Kept::choose(w.view(), &Recipe { keep_cols: 1, ..Recipe::default() }, None);
        assert_eq!(by_weight.columns, vec![3]);
        let x = Array2::from_shape_vec((1, 4), vec![0.0f32, 0.0, 50.0, 1.0]).unwrap();
        let calib = Calibration::from_sample(x);
        let by_activation = Kept::choose(w.view(), &Recipe { keep_cols: 1, ..Recipe::default() }, Some(&calib));
        assert_eq!(by_activation.columns, vec![2]);
        let mut out = Array2::zeros((2, 4));
        kept.restore(w.view(), &mut out);
        assert_eq!((out[[0, 1]], out[[1, 3]], out[[0, 0]]), (-5.0, 7.0, 0.0));
        assert_eq!(kept_count(0.001, 4096 * 4096), 16777);
    }
}
