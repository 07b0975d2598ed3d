//! Dense linear algebra on row-major `ndarray` matrices through `faer` (matrix products,
//! Cholesky factorisation and inversion), single-threaded so that results do not depend on the
//! machine's core count.

use crate::error::{Error, Result};
use faer::linalg::matmul::matmul;
use faer::{Accum, MatMut, MatRef, Par, Side};
use ndarray::{Array2, ArrayView2, ArrayViewMut2};

/// A row-major ndarray view as a faer matrix view (no copy).
pub fn view<'a>(a: &ArrayView2<'a, f32>) -> MatRef<'a, f32> {
    let (rows, cols) = a.dim();
    let strides = a.strides();
    // SAFETY: pointer, shape and strides come from a live ndarray view of the same lifetime,
    // which guarantees every addressed element is valid.
    unsafe { MatRef::from_raw_parts(a.as_ptr(), rows, cols, strides[0], strides[1]) }
}

/// A mutable row-major ndarray view as a faer matrix view (no copy).
pub fn view_mut<'a>(a: &'a mut ArrayViewMut2<f32>) -> MatMut<'a, f32> {
    let (rows, cols) = a.dim();
    let strides = a.strides().to_vec();
    // SAFETY: as in `view`; the exclusive borrow of `a` makes the faer view the only writer.
    unsafe { MatMut::from_raw_parts_mut(a.as_mut_ptr(), rows, cols, strides[0], strides[1]) }
}

/// a·bᵀ for a: [m, k], b: [n, k].
pub fn matmul_transposed(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    let mut out = Array2::<f32>::zeros((a.nrows(), b.nrows()));
    matmul(view_mut(&mut out.view_mut()), Accum::Replace, view(&a), view(&b).transpose(), 1.0, Par::Seq);
    out
}

/// dst −= a·b.
pub fn subtract_product(mut dst: ArrayViewMut2<f32>, a: ArrayView2<f32>, b: ArrayView2<f32>) {
    matmul(view_mut(&mut dst), Accum::Add, view(&a), view(&b), -1.0, Par::Seq);
}

/// scale·xᵀx for x: [tokens, k] (a Gram matrix, k × k). Only the lower half is computed (the
/// product is symmetric) and then mirrored, which halves the work.
pub fn gram(x: ArrayView2<f32>, scale: f32) -> Array2<f32> {
    use faer::linalg::matmul::triangular::{matmul as triangular_matmul, BlockStructure};
    let k = x.ncols();
    let mut out = Array2::<f32>::zeros((k, k));
    triangular_matmul(
        view_mut(&mut out.view_mut()),
        BlockStructure::TriangularLower,
        Accum::Replace,
        view(&x).transpose(),
        BlockStructure::Rectangular,
        view(&x),
        BlockStructure::Rectangular,
        scale,
        Par::Seq,
    );
    for i in 0..k {
        for j in i + 1..k {
            out[[i, j]] = out[[j, i]];
        }
    }
    out
}

/// The upper-triangular U with Uᵀ·U = H⁻¹ for a symmetric positive definite H.
///
/// With P the order-reversing permutation and P·H·P = L̃·L̃ᵀ (Cholesky), H⁻¹ = P·L̃⁻ᵀ·L̃⁻¹·P,
/// so U = P·L̃⁻¹·P, which is upper triangular. One factorisation and one triangular inverse
/// (2n³/3 flops) replace the inverse-then-factorise route (5n³/3 flops) with the same result.
pub fn inverse_cholesky_upper(h: &Array2<f32>) -> Result<Array2<f32>> {
    let n = h.nrows();
    let not_definite = || Error::Numerical {
        detail: "the calibration Hessian is not positive definite; raise the dampening (--damp) or give more calibration tokens".into(),
    };
    let reversed = faer::Mat::<f32>::from_fn(n, n, |i, j| h[[n - 1 - i, n - 1 - j]]);
    let factor = reversed.llt(Side::Lower).map_err(|_| not_definite())?;
    let mut inverse = faer::Mat::<f32>::zeros(n, n);
    faer::linalg::triangular_inverse::invert_lower_triangular(inverse.as_mut(), factor.L(), Par::Seq);
    let u = Array2::from_shape_fn((n, n), |(i, j)| if j >= i { inverse[(n - 1 - i, n - 1 - j)] } else { 0.0 });
    if u.iter().all(|v| v.is_finite()) { Ok(u) } else { Err(not_definite()) }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn products_match_the_definition() {
        let a = Array2::from_shape_vec((2, 3), vec![1.0f32, 2.0, 3.0, 4.0, 5.0, 6.0]).unwrap();
        let b = Array2::from_shape_vec((1, 3), vec![1.0f32, 0.0, -1.0]).unwrap();
        assert_eq!(matmul_transposed(a.view(), b.view()), Array2::from_shape_vec((2, 1), vec![-2.0, -2.0]).unwrap());
        assert_eq!(gram(a.view(), 1.0)[[0, 2]], 1.0 * 3.0 + 4.0 * 6.0);
        let mut d = Array2::<f32>::ones((2, 2));
        subtract_product(d.view_mut(), a.slice(ndarray::s![.., 0..1]), b.slice(ndarray::s![.., 0..2]));
        assert_eq!(d, Array2::from_shape_vec((2, 2), vec![0.0, 1.0, -3.0, 1.0]).unwrap());
    }

    #[test]
    fn inverse_cholesky_reconstructs_the_inverse() {
        let h = Array2::from_shape_vec((3, 3), vec![4.0f32, 1.0, 0.5, 1.0, 3.0, 0.2, 0.5, 0.2, 2.0]).unwrap();
        let u = inverse_cholesky_upper(&h).unwrap();
        let inv = u.t().dot(&u);
        let identity = h.dot(&inv);
        for i in 0..3 {
            for j in 0..3 {
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((identity[[i, j]] - want).abs() < 1e-5, "{identity:?}");
            }
        }
        assert!(u[[2, 0]] == 0.0 && u[[0, 2]] != 0.0, "upper triangular");
        let singular = Array2::<f32>::zeros((2, 2));
        assert!(inverse_cholesky_upper(&singular).is_err());
    }
}
