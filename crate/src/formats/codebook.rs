//! Learned codebooks: 2^b levels per tensor or per row, fitted to the weights by the Lloyd–Max
//! algorithm (Lloyd 1957/1982; Max 1960), which is 1-D k-means: alternately put each boundary
//! halfway between neighbouring levels and move each level to the mean of the values between
//! its boundaries.
//!
//! Initialisation (deterministic): the levels start at the (i + ½)/2^b quantiles of the values.
//! Stopping rule: stop when an iteration lowers the mean squared error by less than 10⁻⁷ of
//! itself, or after 100 iterations. Each pass is O(levels · log n) on the sorted values with
//! prefix sums. The levels are then stored as f16 (16 bits each, counted in the bit cost) and
//! every value maps to its nearest stored level.

use half::f16;
pub use super::{midpoints, nearest_level};
use std::ops::RangeInclusive;

/// Codebook sizes offered, in bits (2 to 256 levels).
pub const BITS: RangeInclusive<u8> = 1..=8;
/// Most Lloyd–Max iterations.
pub const MAX_ITERATIONS: usize = 100;
const TOLERANCE: f64 = 1e-7;
/// Bits of one stored level.
pub const LEVEL_BITS: u64 = 16;

/// A fitted codebook.
#[derive(Debug, Clone, PartialEq)]
pub struct Codebook {
    /// The levels, ascending, as stored (f16 values).
    pub levels: Vec<f32>,
    /// Iterations run.
    pub iterations: usize,
    /// Mean squared error of the unrounded levels on the fitted values.
    pub mse: f64,
}

/// Fit `count` levels to `values` (finite).
pub fn fit(values: &[f32], count: usize) -> Codebook {
    let mut sorted: Vec<f32> = values.to_vec();
    sorted.sort_unstable_by(f32::total_cmp);
    let n = sorted.len();
    if n == 0 {
        return Codebook { levels: vec![0.0], iterations: 0, mse: 0.0 };
    }
    // Values with at most `count` distinct members are their own best codebook (zero error).
    // The quantile start would merge repeated values into fewer levels, which Lloyd–Max never
    // splits again: 16 values on 16 levels could end on 4, and a codebook run on its own
    // output would not give it back.
    let distinct_up_to_one_past_count = 1 + sorted.windows(2).filter(|w| w[0] != w[1]).take(count).count();
    if distinct_up_to_one_past_count <= count {
        sorted.dedup();
        return Codebook { levels: stored(sorted.iter().map(|&v| f64::from(v))), iterations: 0, mse: 0.0 };
    }
    let mut sum = Vec::with_capacity(n + 1);
    let mut sum_sq = Vec::with_capacity(n + 1);
    let (mut s, mut q) = (0f64, 0f64);
    sum.push(0.0);
    sum_sq.push(0.0);
    for &v in &sorted {
        s += f64::from(v);
        q += f64::from(v) * f64::from(v);
        sum.push(s);
        sum_sq.push(q);
    }
    let mut levels: Vec<f64> = (0..count).map(|i| f64::from(sorted[((i as f64 + 0.5) / count as f64 * n as f64) as usize % n])).collect();
    levels.dedup();
    let mut mse = f64::INFINITY;
    let mut iterations = 0;
    while iterations < MAX_ITERATIONS {
        iterations += 1;
        // Segment k holds the sorted values in [start[k], start[k + 1]).
        let mut start = vec![0usize; levels.len() + 1];
        for k in 1..levels.len() {
            let boundary = (levels[k - 1] + levels[k]) / 2.0;
            start[k] = sorted.partition_point(|&v| f64::from(v) < boundary);
        }
        start[levels.len()] = n;
        let mut error = 0f64;
        for k in 0..levels.len() {
            let (a, b) = (start[k], start[k + 1]);
            if b > a {
                let (s, q, m) = (sum[b] - sum[a], sum_sq[b] - sum_sq[a], (b - a) as f64);
                let c = levels[k];
                error += q - 2.0 * c * s + m * c * c;
                levels[k] = s / m;
            }
        }
        let error = error / n as f64;
        let done = mse - error <= TOLERANCE * error;
        mse = error;
        if done {
            break;
        }
    }
    Codebook { levels: stored(levels.into_iter()), iterations, mse }
}

/// Levels as stored: f16 values, ascending, without repeats.
fn stored(levels: impl Iterator<Item = f64>) -> Vec<f32> {
    let mut stored: Vec<f32> = levels.map(|l| f16::from_f32(l as f32).to_f32()).collect();
    stored.dedup();
    stored
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Source: J. Max, "Quantizing for minimum distortion", IRE Trans. Inf. Theory, 1960, table I
    /// (from memory): the minimum mean squared errors of 2-, 4-, 8- and 16-level quantizers of a
    /// unit Gaussian are 0.3634, 0.1175, 0.03454 and 0.009497.
    #[test]
    fn lloyd_max_reaches_max_s_gaussian_table() {
        let mut rng = crate::demo::Rng::new(1960);
        let values: Vec<f32> = (0..1_000_000).map(|_| rng.normal() as f32).collect();
        for (levels, want) in [(2, 0.3634), (4, 0.1175), (8, 0.03454), (16, 0.009497)] {
            let cb = fit(&values, levels);
            assert!((cb.mse / want - 1.0).abs() < 0.01, "{levels} levels: mse {} vs Max {want}", cb.mse);
            assert!(cb.iterations <= MAX_ITERATIONS);
            assert_eq!(cb.levels.len(), levels);
        }
    }

    #[test]
    fn small_and_degenerate_inputs_fit() {
        assert_eq!(fit(&[], 4).levels, vec![0.0]);
        assert_eq!(fit(&[2.0; 5], 4).levels, vec![2.0]);
        let cb = fit(&[-1.0, -1.0, 3.0, 3.0], 2);
        assert_eq!(cb.levels, vec![-1.0, 3.0]);
        assert_eq!(cb.mse, 0.0);
        // 16 distinct values, most of them on two: every value keeps a level of its own.
        let skewed: Vec<f32> = (0..16).flat_map(|i| vec![i as f32 - 7.5; if i == 7 || i == 8 { 100 } else { 1 }]).collect();
        let cb = fit(&skewed, 16);
        assert_eq!(cb.levels, (0..16).map(|i| i as f32 - 7.5).collect::<Vec<_>>());
        assert_eq!(cb.mse, 0.0);
    }
}
