//! Seeded, invented demo data.
//!
//! The scenario is our own: the feed-forward up-projection of block 3 of a small, made-up
//! on-device captioning model, 1024 output × 4096 input channels. Weights are a Gaussian scale
//! mixture (a normal times a log-normal factor), which gives the heavy tails that trained layers
//! show, with each row's spread varying a little, and eight input columns made 4–12× larger than
//! the rest, the outlier-column pattern that makes per-group quantization hard.
//!
//! The matching activation sample, 512 tokens × 4096 input channels, mixes 16 shared latent
//! factors (so channels are correlated, as a layer's inputs are) with independent noise, and
//! gives six channels a gain of 20–100×: the large-activation-outlier pattern that the
//! SmoothQuant and LLM.int8() papers describe.
//!
//! The generator is SplitMix64 (Steele, Lea and Flood, "Fast splittable pseudorandom number
//! generators", OOPSLA 2014) with the Box–Muller transform for normals, written here rather than
//! taken from a crate so that the seeded stream, and so every demo figure and saved link, stays
//! the same across dependency upgrades. Its state is a Weyl sequence (the seed plus n times a
//! fixed odd constant, before the output mix), so the generator can start at any place of the
//! stream at once: blocks of rows are generated in parallel, each from its own place, and the
//! values are those of one pass in row order.

use crate::tensor::{DType, Tensor};
use ndarray::Array2;

/// Rows of the demo weight (output channels).
pub const DEMO_ROWS: usize = 1024;
/// Columns of the demo weight (input channels).
pub const DEMO_COLS: usize = 4096;
/// Name shown for the demo weight.
pub const DEMO_NAME: &str = "demo.block3.ffn.up.weight";
const DEMO_SEED: u64 = 0x6269_746c_6f75_7065;
const OUTLIER_COLUMNS: usize = 8;
/// Tokens in the demo activation sample.
pub const DEMO_TOKENS: usize = 512;
/// Name shown for the demo activation sample.
pub const DEMO_ACTIVATIONS_NAME: &str = "demo.block3.ffn.up.input";
const ACTIVATION_SEED: u64 = 0x6163_7469_7661_7465;
const LATENT_FACTORS: usize = 16;
const OUTLIER_CHANNELS: usize = 6;

/// SplitMix64's increment of its state per output (the odd constant of the Weyl sequence).
const GAMMA: u64 = 0x9E37_79B9_7F4A_7C15;

/// A small seeded pseudorandom generator (SplitMix64).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Rng {
    state: u64,
}

impl Rng {
    /// A generator starting from `seed`.
    pub fn new(seed: u64) -> Self {
        Rng { state: seed }
    }

    /// This generator as it will be `draws` outputs later.
    pub fn skipped(&self, draws: u64) -> Self {
        Rng { state: self.state.wrapping_add(draws.wrapping_mul(GAMMA)) }
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.state = self.state.wrapping_add(GAMMA);
        let mut z = self.state;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1), with 53 random bits.
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Standard normal (Box–Muller, one of the pair).
    pub fn normal(&mut self) -> f64 {
        let u1 = 1.0 - self.uniform(); // in (0, 1], so the logarithm is finite
        let u2 = self.uniform();
        (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
    }

    /// Uniform integer in [0, n).
    pub fn below(&mut self, n: usize) -> usize {
        (self.uniform() * n as f64) as usize % n.max(1)
    }
}

/// The demo weight: seeded, invented, shaped like a projection layer.
pub fn weight() -> Tensor {
    let mut rng = Rng::new(DEMO_SEED);
    let (row_spread, column_gain) = weight_scales(&mut rng);
    // Two normals, four draws, per value.
    let values = fill_rows(&rng, DEMO_ROWS, DEMO_COLS, 4, |rng, r, out| {
        for (o, gain) in out.iter_mut().zip(&column_gain) {
            let heavy = rng.normal() * (0.5 * rng.normal()).exp();
            *o = (row_spread[r] * gain * heavy) as f32;
        }
    });
    Tensor::from_values(DEMO_NAME, DType::F32, values)
}

/// The demo weight's spread per row and gain per column, the first draws of its stream.
fn weight_scales(rng: &mut Rng) -> (Vec<f64>, Vec<f64>) {
    let row_spread: Vec<f64> = (0..DEMO_ROWS).map(|_| 0.02 * (0.15 * rng.normal()).exp()).collect();
    let mut column_gain = vec![1.0f64; DEMO_COLS];
    for _ in 0..OUTLIER_COLUMNS {
        let col = rng.below(DEMO_COLS);
        column_gain[col] = 4.0 + 8.0 * rng.uniform();
    }
    (row_spread, column_gain)
}

/// The demo activations' mixed latent factors [tokens, channels] and gain per channel, the first
/// draws of their stream.
fn activation_factors(rng: &mut Rng) -> (Array2<f32>, Vec<f32>) {
    let mixing = Array2::from_shape_fn((LATENT_FACTORS, DEMO_COLS), |_| (rng.normal() * 0.35) as f32);
    let latent = Array2::from_shape_fn((DEMO_TOKENS, LATENT_FACTORS), |_| rng.normal() as f32);
    let mut gain = vec![1.0f32; DEMO_COLS];
    for _ in 0..OUTLIER_CHANNELS {
        gain[rng.below(DEMO_COLS)] = (20.0 + 80.0 * rng.uniform()) as f32;
    }
    (latent.dot(&mixing), gain)
}

/// A `[rows, cols]` array whose row `r` is written by `fill(generator, r, row)`, where every
/// value takes `draws_per_value` outputs of the generator's stream, continuing `rng`'s in row
/// order. Blocks of rows run in parallel (see [`crate::rows`]), each generator started at its
/// block's place in the stream, so the values are the same on any number of threads.
fn fill_rows(rng: &Rng, rows: usize, cols: usize, draws_per_value: u64, fill: impl Fn(&mut Rng, usize, &mut [f32]) + Sync + Send) -> Array2<f32> {
    let mut values = vec![0f32; rows * cols];
    crate::rows::map_chunks_mut(&mut values, cols, crate::rows::ROW_BLOCK, &mut |_, _| {}, |first, block| {
        let mut generator = rng.skipped((first * cols) as u64 * draws_per_value);
        for (i, row) in block.chunks_mut(cols).enumerate() {
            fill(&mut generator, first + i, row);
        }
        debug_assert_eq!(generator, rng.skipped(((first * cols + block.len()) as u64) * draws_per_value), "each value takes {draws_per_value} draws");
    });
    Array2::from_shape_vec((rows, cols), values).expect("sizes match")
}

/// The demo activation sample matched to [`weight`]: [512 tokens, 4096 channels].
pub fn activations() -> Tensor {
    let mut rng = Rng::new(ACTIVATION_SEED);
    let (mixed, gain) = activation_factors(&mut rng);
    // One normal, two draws, per value.
    let values = fill_rows(&rng, DEMO_TOKENS, DEMO_COLS, 2, |rng, t, out| {
        for ((o, &v), g) in out.iter_mut().zip(mixed.row(t)).zip(&gain) {
            *o = (v + 0.6 * rng.normal() as f32) * g;
        }
    });
    Tensor::from_values(DEMO_ACTIVATIONS_NAME, DType::F32, values)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix_matches_its_published_reference_output() {
        // First outputs for seed 1234567 of the reference C code of SplitMix64 (from memory of
        // the published test vector, checked here against an independent computation).
        let mut rng = Rng::new(1234567);
        assert_eq!(rng.next_u64(), 6457827717110365317);
        assert_eq!(rng.next_u64(), 3203168211198807973);
    }

    #[test]
    fn a_skipped_generator_continues_the_stream() {
        let mut rng = Rng::new(99);
        let ahead = rng.skipped(1000);
        for _ in 0..1000 {
            rng.next_u64();
        }
        assert_eq!(rng, ahead);
        assert_eq!(Rng::new(5).skipped(0), Rng::new(5));
    }

    #[test]
    fn demo_data_generated_in_blocks_equals_one_pass_in_row_order() {
        // The values drawn in one sequential pass, the reference for the blocks.
        let mut rng = Rng::new(DEMO_SEED);
        let (row_spread, column_gain) = weight_scales(&mut rng);
        let mut values = Vec::with_capacity(DEMO_ROWS * DEMO_COLS);
        for spread in &row_spread {
            for gain in &column_gain {
                let heavy = rng.normal() * (0.5 * rng.normal()).exp();
                values.push((spread * gain * heavy) as f32);
            }
        }
        let on = |threads| rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap().install(weight);
        for threads in [1, 3] {
            let w = on(threads);
            assert!(w.values.iter().zip(&values).all(|(a, b)| a.to_bits() == b.to_bits()), "{threads} threads");
        }

        let mut rng = Rng::new(ACTIVATION_SEED);
        let (mut expected, gain) = activation_factors(&mut rng);
        for mut row in expected.rows_mut() {
            for (v, g) in row.iter_mut().zip(&gain) {
                *v = (*v + 0.6 * rng.normal() as f32) * g;
            }
        }
        let x = rayon::ThreadPoolBuilder::new().num_threads(3).build().unwrap().install(activations);
        assert!(x.values.iter().zip(&expected).all(|(a, b)| a.to_bits() == b.to_bits()));
    }

    #[test]
    fn normals_have_unit_moments() {
        let mut rng = Rng::new(1);
        let n = 200_000;
        let xs: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
        let mean = xs.iter().sum::<f64>() / n as f64;
        let var = xs.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n as f64;
        assert!(mean.abs() < 0.01 && (var - 1.0).abs() < 0.01, "mean {mean} var {var}");
    }

    #[test]
    fn demo_weight_has_outlier_columns_and_heavy_tails() {
        let t = weight();
        assert_eq!(t.shape, vec![DEMO_ROWS, DEMO_COLS]);
        assert_eq!(t, weight(), "seeded: the same every time");
        let a = crate::analyze(&t, &crate::Recipe::default()).unwrap();
        let outliers = a.columns.outliers();
        assert!((4..=OUTLIER_COLUMNS).contains(&outliers.len()), "{} outlier columns", outliers.len());
        let n = t.values.len() as f64;
        let m2 = t.values.iter().map(|&v| (v as f64).powi(2)).sum::<f64>() / n;
        let m4 = t.values.iter().map(|&v| (v as f64).powi(4)).sum::<f64>() / n;
        assert!(m4 / (m2 * m2) > 5.0, "kurtosis {} shows heavy tails (a normal has 3)", m4 / (m2 * m2));
    }

    #[test]
    fn demo_activations_have_a_few_loud_channels() {
        let x = activations();
        assert_eq!(x.shape, vec![DEMO_TOKENS, DEMO_COLS]);
        let calib = crate::calib::Calibration::from_sample(x.values.clone());
        let mut sorted = calib.max_abs.clone();
        sorted.sort_by(f32::total_cmp);
        let median = sorted[DEMO_COLS / 2];
        let loud = calib.max_abs.iter().filter(|&&m| m > 15.0 * median).count();
        assert!((4..=OUTLIER_CHANNELS).contains(&loud), "{loud} loud channels");
        assert!(sorted[DEMO_COLS - 1] > 20.0 * median);
    }
}
