//! Dense linear algebra on row-major `ndarray` matrices through `faer` (matrix products,
//! Cholesky factorisation and inversion). Each faer call runs single-threaded, so that results do
//! not depend on the machine's core count; a large product is split into fixed blocks of its
//! columns, which go to the pool.

use crate::error::{Error, Result};
use faer::linalg::matmul::matmul;
use faer::dyn_stack::{MemBuffer, MemStack};
use faer::linalg::cholesky::llt::factor::{cholesky_in_place, cholesky_in_place_scratch};
use faer::linalg::triangular_inverse::invert_lower_triangular;
use faer::{Accum, MatMut, MatRef, Par};
use crate::rows;
use ndarray::{s, Array2, ArrayView2, ArrayViewMut2};

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

/// Run a faer call, then leave the vector registers clean for the four-lane kernels of
/// [`crate::simd`] that run next on the same thread. faer's kernels use the CPU's widest vectors
/// (AVX-512 on this project's CI machine) and return with their upper halves in use; until a
/// `vzeroupper` clears them, the SSE code that follows ran four times slower there (AWQ's
/// quantization of one candidate, on the thread that had just computed a product: 130 ms against
/// 31 ms). A no-op off x86-64 and on CPUs without AVX.
fn clean_after<R>(call: impl FnOnce() -> R) -> R {
    let result = call();
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx") {
        #[target_feature(enable = "avx")]
        fn zero_upper() {
            core::arch::x86_64::_mm256_zeroupper();
        }
        // SAFETY: the CPU has AVX, checked just above.
        unsafe { zero_upper() };
    }
    result
}

/// a·bᵀ for a: [m, k], b: [n, k]. The rows of b (the product's columns) are taken in the fixed
/// row blocks of [`rows`], one single-threaded product each ([`matmul_transposed_block`]), spread
/// over the pool: an output error on 512 tokens of a 4096 × 4096 layer is 8.6 GFLOP. Blocks of b
/// rather than of a, because each product packs its right-hand operand whole: blocks of a would
/// pack all of b once per block. The same blocks as every row-wise computation, so that a
/// reconstruction's output error taken block by block as it is made (`analysis`) sees exactly the
/// columns this product gives.
pub fn matmul_transposed(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    let (m, n) = (a.nrows(), b.nrows());
    let parts = rows::map_blocks(n, |range| matmul_transposed_block(a, b.slice(s![range, ..])));
    let mut out = Array2::<f32>::zeros((m, n));
    for (i, part) in parts.iter().enumerate() {
        out.slice_mut(s![.., rows::block_rows(i, n)]).assign(part);
    }
    out
}

/// a·bᵀ on the calling thread: one block of [`matmul_transposed`].
pub fn matmul_transposed_block(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    let mut out = Array2::<f32>::zeros((a.nrows(), b.nrows()));
    clean_after(|| matmul(view_mut(&mut out.view_mut()), Accum::Replace, view(&a), view(&b).transpose(), 1.0, Par::Seq));
    out
}

/// dst −= a·b.
pub fn subtract_product(mut dst: ArrayViewMut2<f32>, a: ArrayView2<f32>, b: ArrayView2<f32>) {
    clean_after(|| matmul(view_mut(&mut dst), Accum::Add, view(&a), view(&b), -1.0, Par::Seq));
}

/// scale·xᵀx for x: [tokens, k] (a Gram matrix, k × k). Only the lower half is computed (the
/// product is symmetric) and then mirrored, which halves the work.
pub fn gram(x: ArrayView2<f32>, scale: f32) -> Array2<f32> {
    use faer::linalg::matmul::triangular::{matmul as triangular_matmul, BlockStructure};
    let k = x.ncols();
    let mut out = Array2::<f32>::zeros((k, k));
    clean_after(|| triangular_matmul(
        view_mut(&mut out.view_mut()),
        BlockStructure::TriangularLower,
        Accum::Replace,
        view(&x).transpose(),
        BlockStructure::Rectangular,
        view(&x),
        BlockStructure::Rectangular,
        scale,
        Par::Seq,
    ));
    for i in 0..k {
        for j in i + 1..k {
            out[[i, j]] = out[[j, i]];
        }
    }
    out
}

/// The upper-triangular U with Uᵀ·U = H⁻¹ for a symmetric positive definite H (row-major), in
/// H's memory and one more matrix: a wide layer's H is large (14 336 input columns: 822 MB), and
/// the page has 4 GiB in all.
///
/// With P the order-reversing permutation and P·H·P = L̃·L̃ᵀ (Cholesky), H⁻¹ = P·L̃⁻ᵀ·L̃⁻¹·P,
/// so U = P·L̃⁻¹·P, which is upper triangular. One factorisation and one triangular inverse
/// (2n³/3 flops) replace the inverse-then-factorise route (5n³/3 flops) with the same result.
/// Element (i, j) of P·A·P is element (n−1−i, n−1−j) of A, which is a square buffer read
/// backwards; and a symmetric matrix reads the same row-major and column-major.
pub fn inverse_cholesky_upper(mut h: Array2<f32>) -> Result<Array2<f32>> {
    let n = h.nrows();
    let not_definite = || Error::Numerical {
        detail: "the calibration Hessian is not positive definite; raise the dampening or give more calibration tokens".into(),
    };
    // Allocated first, so that a lack of memory shows before the factorisation's n³/3 steps.
    let mut u = Array2::<f32>::zeros((n, n));
    let reversed = h.as_slice_mut().expect("a Hessian is built row-major");
    reversed.reverse();
    let mut scratch = MemBuffer::new(cholesky_in_place_scratch::<f32>(n, Par::Seq, Default::default()));
    let factor = MatMut::from_column_major_slice_mut(&mut *reversed, n, n);
    clean_after(|| cholesky_in_place(factor, Default::default(), Par::Seq, MemStack::new(&mut scratch), Default::default()))
        .map_err(|_| not_definite())?;
    // L̃ is the lower triangle; what is left above it of P·H·P goes.
    for c in 0..n {
        reversed[c * n..c * n + c].fill(0.0);
    }
    // The inverse writes only its lower triangle: the rest of `u` stays 0.
    let inverse = u.as_slice_mut().expect("fresh and row-major");
    let factor = MatRef::from_column_major_slice(&*reversed, n, n);
    clean_after(|| invert_lower_triangular(MatMut::from_column_major_slice_mut(&mut *inverse, n, n), factor, Par::Seq));
    drop(h);
    // L̃⁻¹ column-major, read backwards, is P·L̃⁻¹·P column-major: U, whose row-major form is
    // its transpose.
    inverse.reverse();
    for i in 0..n {
        for j in i + 1..n {
            inverse.swap(i * n + j, j * n + i);
        }
    }
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

    /// The block-wise product against the definition in f64, over sizes with no rows or columns,
    /// one of each, and columns that are not a multiple of the block (integers small enough that
    /// every sum is exact in f32, so the two must agree exactly); and the same bits on one thread
    /// and four.
    #[test]
    fn block_products_match_the_definition_on_any_thread_count() {
        let mut rng = crate::demo::Rng::new(3);
        for (m, k, n) in [(0, 3, 2), (1, 1, 1), (65, 7, 5), (130, 33, 17), (3, 0, 4), (5, 9, 1100), (2, 3, 0)] {
            let a = Array2::from_shape_fn((m, k), |_| (rng.normal() * 4.0).round() as f32);
            let b = Array2::from_shape_fn((n, k), |_| (rng.normal() * 4.0).round() as f32);
            let want = Array2::from_shape_fn((m, n), |(i, j)| (0..k).map(|t| f64::from(a[[i, t]]) * f64::from(b[[j, t]])).sum::<f64>() as f32);
            assert_eq!(matmul_transposed(a.view(), b.view()), want, "{m} × {k} × {n}");
        }
        let a = Array2::from_shape_fn((200, 96), |_| rng.normal() as f32);
        let b = Array2::from_shape_fn((1300, 96), |_| rng.normal() as f32);
        let on = |threads| rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap().install(|| matmul_transposed(a.view(), b.view()));
        let (one, four) = (on(1), on(4));
        assert!(one.iter().zip(&four).all(|(x, y)| x.to_bits() == y.to_bits()));
    }

    #[test]
    fn inverse_cholesky_reconstructs_the_inverse() {
        let h = Array2::from_shape_vec((3, 3), vec![4.0f32, 1.0, 0.5, 1.0, 3.0, 0.2, 0.5, 0.2, 2.0]).unwrap();
        let u = inverse_cholesky_upper(h.clone()).unwrap();
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
        assert!(inverse_cholesky_upper(singular).is_err());
    }
}
