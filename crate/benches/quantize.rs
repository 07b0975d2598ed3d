//! Seeded benchmarks of the core (divan). Run with `cargo xtask bench`.
//!
//! `analyze_4096x4096_int4_g128`: quantize + dequantize + every statistic (per tensor, per group,
//! per column) for a 4096×4096 f32 tensor, 4-bit asymmetric, groups of 128, f16 scales,
//! single-threaded. Divide the median time by 4096² for nanoseconds per weight.

use bitloupe::demo::Rng;
use bitloupe::{analyze, DType, Recipe, Tensor};
use divan::counter::ItemsCount;
use ndarray::Array2;

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

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
    let one = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap();
    bencher
        .counter(ItemsCount::new(tensor.values.len()))
        .bench(|| one.install(|| analyze(divan::black_box(&tensor), &recipe).unwrap()));
}

/// The speed table's cases (see bench/compare.py): the default recipe with every statistic on
/// one thread; `f16` cases time reading the tensor from f16 `.safetensors` bytes in
/// memory (the chunked conversion to f32) plus the analysis.
#[divan::bench(sample_count = 5, args = ["2048x2048/f32", "2048x2048/f16", "4096x4096/f32", "4096x4096/f16", "4096x14336/f32", "4096x14336/f16"])]
fn rtn_case(bencher: divan::Bencher, case: &str) {
    let (shape, dtype) = case.split_once('/').expect("shape/dtype");
    let (rows, cols) = shape.split_once('x').map(|(r, c)| (r.parse().unwrap(), c.parse().unwrap())).expect("RxC");
    let tensor = gaussian(rows, cols);
    let recipe = Recipe::default();
    let pool = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap();
    if dtype == "f16" {
        let data = tensor.values.iter().flat_map(|&v| half::f16::from_f32(v).to_le_bytes()).collect();
        let outgoing = bitloupe::tensor::safetensors::Outgoing { name: "w", dtype: "F16", shape: vec![rows, cols], data };
        let bytes = bitloupe::tensor::safetensors::write(&[outgoing], &Default::default());
        bencher.counter(ItemsCount::new(rows * cols)).bench(|| {
            pool.install(|| {
                let listing = bitloupe::tensor::list(bytes.as_slice(), Default::default()).unwrap();
                let t = bitloupe::tensor::read(bytes.as_slice(), listing.choose(None).unwrap()).unwrap();
                analyze(&t, &recipe).unwrap()
            })
        });
    } else {
        bencher.counter(ItemsCount::new(rows * cols)).bench(|| pool.install(|| analyze(divan::black_box(&tensor), &recipe).unwrap()));
    }
}

/// Round to nearest on every core (compare with the single-threaded
/// `analyze_4096x4096_int4_g128`; the figures are identical).
#[divan::bench(sample_count = 10)]
fn analyze_4096x4096_all_cores(bencher: divan::Bencher) {
    let tensor = gaussian(4096, 4096);
    let recipe = Recipe::default();
    bencher.counter(ItemsCount::new(tensor.values.len())).bench(|| analyze(divan::black_box(&tensor), &recipe).unwrap());
}

/// A 4096 × 4096 weight and 512 correlated calibration tokens with a few loud channels.
fn layer_with_calibration() -> (Tensor, bitloupe::calib::Calibration) {
    let weight = gaussian(4096, 4096);
    let mut rng = Rng::new(7);
    let latent = Array2::from_shape_fn((512, 16), |_| rng.normal() as f32);
    let mixing = Array2::from_shape_fn((16, 4096), |_| rng.normal() as f32 * 0.35);
    let mut x = latent.dot(&mixing);
    x.mapv_inplace(|v| v + 0.6 * rng.normal() as f32);
    for t in 0..512 {
        x[[t, 17]] *= 60.0;
        x[[t, 2900]] *= 30.0;
    }
    (weight, bitloupe::calib::Calibration::from_sample(x))
}

/// GPTQ on one thread, as its goal is stated (at most 5 s).
#[divan::bench(sample_count = 2, sample_size = 1)]
fn gptq_4096x4096_512_tokens_int4_g128(bencher: divan::Bencher) {
    method_with_calibration(bencher, bitloupe::recipe::Method::Gptq);
}

/// AWQ's search on one thread, to set beside GPTQ's.
#[divan::bench(sample_count = 2, sample_size = 1)]
fn awq_4096x4096_512_tokens_int4_g128(bencher: divan::Bencher) {
    method_with_calibration(bencher, bitloupe::recipe::Method::Awq);
}

fn method_with_calibration(bencher: divan::Bencher, method: bitloupe::recipe::Method) {
    let (tensor, calib) = layer_with_calibration();
    let recipe = Recipe { method, ..Recipe::default() };
    let one = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap();
    bencher.bench(|| one.install(|| bitloupe::analyze_with(&tensor, &recipe, Some(&calib), &mut |_, _| {}).unwrap()));
}

/// Every format on the 4096 × 4096 tensor with its default recipe, single-threaded (compare with
/// `analyze_4096x4096_int4_g128`, and for the formats in groups of 32 with `int4_g32`); the
/// codebook fits 16 levels to each of the 4096 rows.
#[divan::bench(sample_count = 5, args = ["int4_g32", "nf4", "e2m1", "e2m3", "e3m2", "e4m3", "e5m2", "mxfp4", "mxfp6e2m3", "mxfp6e3m2", "mxfp8e4m3", "mxfp8e5m2", "mxint8", "codebook"])]
fn format_4096x4096(bencher: divan::Bencher, format: &str) {
    let tensor = gaussian(4096, 4096);
    let recipe = match format {
        "int4_g32" => Recipe { granularity: bitloupe::recipe::Granularity::Group(32), ..Recipe::default() },
        name => Recipe::for_format(name.parse().unwrap()),
    };
    let one = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap();
    bencher
        .counter(ItemsCount::new(tensor.values.len()))
        .bench(|| one.install(|| analyze(divan::black_box(&tensor), &recipe).unwrap()));
}
