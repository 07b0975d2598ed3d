//! The memory estimate of `footprint` against the peak a counting allocator measures, for every
//! kind of recipe, with a sample, with per-column statistics or with no calibration, over shapes
//! with a partial row block and a partial group: never below it, and at most twice it plus a
//! quarter of the tensor's size (the fixed part aside). The same for the estimate of an export of
//! each result.

use bitloupe::calib::{CalibKind, Calibration};
use bitloupe::footprint::{export_bytes, working_bytes, FIXED_BYTES};
use bitloupe::formats::Format;
use bitloupe::packed::pack;
use bitloupe::recipe::Method;
use bitloupe::tensor::npy::write_f32;
use bitloupe::tensor::DType;
use bitloupe::{analyze_with, Granularity, Recipe, Tensor};
use ndarray::Array2;
use std::alloc::System;

#[path = "shared/counting_alloc.rs"]
mod counting_alloc;

#[global_allocator]
static ALLOCATOR: counting_alloc::Counting<System> = counting_alloc::Counting(System);

fn recipes() -> Vec<(Recipe, bool)> {
    let plain = Recipe::default();
    vec![
        (plain, false),
        (Recipe { granularity: Granularity::Group(8), ..plain }, false),
        (Recipe { bits: 8, ..plain }, false),
        (plain, true),
        (Recipe { granularity: Granularity::Row, ..plain }, false),
        (Recipe { granularity: Granularity::Tensor, ..plain }, true),
        (Recipe { method: Method::Clip, ..plain }, false),
        (Recipe { method: Method::Hqq, ..plain }, false),
        (Recipe { method: Method::Hqq, granularity: Granularity::Group(8), ..plain }, false),
        (Recipe::for_format(Format::Nf4), false),
        (Recipe { double_quant: true, ..Recipe::for_format(Format::Nf4) }, false),
        (Recipe::for_format(Format::E2m1), false),
        (Recipe::for_format(Format::Codebook), false),
        (Recipe { keep_frac: 0.005, ..plain }, false),
        (Recipe { keep_cols: 8, ..plain }, true),
        (Recipe { smooth: Some(0.5), ..plain }, true),
        (Recipe { method: Method::Gptq, ..plain }, true),
        (Recipe { method: Method::Gptq, act_order: true, granularity: Granularity::Group(32), ..plain }, true),
        (Recipe { method: Method::Awq, ..plain }, true),
        (Recipe { method: Method::Awq, awq_clip: true, ..plain }, true),
    ]
}

#[test]
fn the_estimate_covers_the_measured_peak_of_every_recipe() {
    const THREADS: usize = 2;
    let pool = rayon::ThreadPoolBuilder::new().num_threads(THREADS).build().unwrap();
    let mut rng = bitloupe::demo::Rng::new(7);
    let mut normal = |shape: (usize, usize)| Array2::from_shape_fn(shape, |_| rng.normal() as f32);
    for (rows, cols, tokens) in [(520, 600, 200), (129, 1000, 64), (1500, 136, 300)] {
        let t = Tensor::from_values("w", DType::F32, normal((rows, cols)));
        let sample = normal((tokens, cols));
        let tensor_bytes = (rows * cols * 4) as u64;
        // The linear algebra's per-thread workspaces are made on first use and kept: made here.
        let warm = Calibration::from_sample(sample.clone());
        for (recipe, _) in recipes().into_iter().filter(|(r, with)| *with && !r.act_order) {
            pool.install(|| analyze_with(&t, &recipe, Some(&warm), &mut |_, _| {})).unwrap();
        }
        // Per-column statistics instead of a sample: the output error is estimated from them.
        let max_abs = Tensor::from_values("s", DType::F32, Array2::from_elem((1, cols), 0.5));
        let statistics = [(Recipe::default(), true), (Recipe { granularity: Granularity::Tensor, ..Recipe::default() }, true)];
        for (index, (recipe, with_calibration)) in recipes().into_iter().chain(statistics).enumerate() {
            let by_statistics = index >= recipes().len();
            let calib = match (with_calibration, by_statistics) {
                (false, _) => None,
                (true, false) => Some(Calibration::from_sample(sample.clone())),
                (true, true) => Some(Calibration::from_tensor(&max_abs, CalibKind::MaxAbs, cols).unwrap()),
            };
            let with_sample = with_calibration && !by_statistics;
            let before = counting_alloc::restart_peak();
            let analysis = pool.install(|| analyze_with(&t, &recipe, calib.as_ref(), &mut |_, _| {})).unwrap();
            let peak = (counting_alloc::peak() - before) as u64;
            let estimate = working_bytes(rows, cols, &recipe, with_sample.then_some(tokens), THREADS) - FIXED_BYTES;
            let case = format!("{} on {rows} × {cols}, sample {with_sample}, statistics {by_statistics}: peak {peak}, estimate {estimate}", recipe.label());
            assert!(peak <= estimate, "{case}");
            assert!(estimate <= 2 * peak + tensor_bytes / 4, "{case}");
            // The exports of the result: the reconstruction as `.npy`, and the packed file (which
            // some results cannot give: GPTQ's kept values with smoothing, say).
            let estimate = export_bytes(&analysis) - FIXED_BYTES;
            let before = counting_alloc::restart_peak();
            let npy = write_f32(analysis.dequantized(&t).unwrap().as_slice().unwrap(), &t.shape);
            let npy_peak = (counting_alloc::peak() - before) as u64;
            drop(npy);
            let before = counting_alloc::restart_peak();
            let packed = pack(&analysis, &t);
            let packed_peak = (counting_alloc::peak() - before) as u64;
            drop(packed);
            let case = format!("export of {case}: .npy peak {npy_peak}, packed peak {packed_peak}, estimate {estimate}");
            assert!(npy_peak.max(packed_peak) <= estimate, "{case}");
            assert!(estimate <= 2 * npy_peak.max(packed_peak) + tensor_bytes / 4, "{case}");
            drop(analysis);
        }
    }
}
