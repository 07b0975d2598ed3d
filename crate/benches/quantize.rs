//! Seeded benchmarks of the core (divan). Run with `cargo xtask bench`.
//!
//! `analyze_4096x4096_int4_g128`: quantize + dequantize + every statistic (per tensor, per group,
//! per column) for a 4096×4096 f32 tensor, 4-bit asymmetric, groups of 128, f16 scales,
//! single-threaded. Divide the median time by 4096² for nanoseconds per weight.

use bitloupe::demo::Rng;
use bitloupe::{analyze, DType, Recipe, Tensor};
use divan::counter::ItemsCount;
use ndarray::Array2;

fn main() {
    divan::main();
}

fn gaussian(rows: usize, cols: usize) -> Tensor {
    let mut rng = Rng::new(42);
    Tensor::from_values("bench", DType::F32, Array2::from_shape_fn((rows, cols), |_| rng.normal() as f32 * 0.02))
}

#[divan::bench(sample_count = 10)]
fn analyze_4096x4096_int4_g128(bencher: divan::Bencher) {
    let tensor = gaussian(4096, 4096);
    let recipe = Recipe::default();
    bencher
        .counter(ItemsCount::new(tensor.values.len()))
        .bench(|| analyze(divan::black_box(&tensor), &recipe).unwrap());
}
