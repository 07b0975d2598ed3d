//! Cross-checks of the calibration-aware methods against plain numpy implementations of each
//! paper's equations (`fixtures/make_fixtures.py`, "methods" section; numpy 2.3.5), on an
//! invented 24 × 192 layer with 256 calibration tokens and three loud activation channels.

use bitloupe::analysis::headline;
use bitloupe::calib::{CalibKind, Calibration};
use bitloupe::methods::smooth::{self, ActQuant};
use bitloupe::methods::MethodFigures;
use bitloupe::recipe::Method;
use bitloupe::tensor::{self, ReadOptions};
use bitloupe::{analyze, analyze_with, Granularity, Recipe, Tensor};
use serde_json::Value;
use std::path::PathBuf;
use std::process::Command;

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../fixtures").join(name)
}

fn open(name: &str) -> Tensor {
    let file = std::fs::File::open(fixture(name)).unwrap();
    let listing = tensor::list(&file, ReadOptions::default()).unwrap();
    tensor::read(&file, listing.choose(None).unwrap()).unwrap()
}

fn expected() -> Value {
    let m: Value = serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap();
    m["methods"].clone()
}

fn case() -> (Tensor, Calibration) {
    let w = open("method_weight.npy");
    let x = open("method_acts.npy");
    let calib = Calibration::from_tensor(&x, CalibKind::Sample, w.cols()).unwrap();
    (w, calib)
}

fn recipe(method: Method, bits: u8, group: usize) -> Recipe {
    Recipe { method, bits, granularity: Granularity::Group(group), ..Recipe::default() }
}

fn close(got: f64, want: f64, rel: f64) -> bool {
    (got - want).abs() <= rel * want.abs()
}

/// Source: SmoothQuant (Xiao et al., ICML 2023), eq. (4) factors and the W8A8 setting of its
/// section 4, computed by numpy: errors to 1e-4 relative, the same best α on the 0.05 grid.
#[test]
fn smoothing_study_matches_numpy() {
    let (w, calib) = case();
    let want = expected();
    for (act, key) in [(ActQuant::Tensor, "tensor"), (ActQuant::Token, "token")] {
        let study = smooth::study(w.values.view(), &calib, 0.5, act, &mut |_, _| {}).unwrap();
        let e = &want["smoothing"][key];
        assert!(close(study.error_without, e["error_without"].as_f64().unwrap(), 1e-4), "{key} without");
        assert!(close(study.error_with, e["error_with_half"].as_f64().unwrap(), 1e-4), "{key} with");
        for (got, w) in study.curve.iter().zip(e["curve"].as_array().unwrap()) {
            assert!(close(got[1], w[1].as_f64().unwrap(), 1e-4), "{key} curve at {}", got[0]);
        }
        assert_eq!(study.best_alpha, e["best_alpha"].as_f64().unwrap() as f32, "{key} best alpha");
        assert!(study.error_with < 0.2 * study.error_without, "loud channels make smoothing pay off");
    }
}

/// Source: AWQ (Lin et al., MLSys 2024), section 3.2 search of s = mean|x|^α, by numpy: the same
/// chosen α, every point of the error curve to 1e-3 relative.
#[test]
fn awq_search_matches_numpy_and_never_loses_to_alpha_zero() {
    let (w, calib) = case();
    let want = &expected()["awq"];
    let a = analyze_with(&w, &recipe(Method::Awq, 3, 64), Some(&calib), &mut |_, _| {}).unwrap();
    let MethodFigures::Awq(figures) = &a.method else { panic!("AWQ figures") };
    assert_eq!(figures.alpha, want["alpha"].as_f64().unwrap() as f32);
    for (got, w) in figures.curve.iter().zip(want["curve"].as_array().unwrap()) {
        assert!(close(got[1], w[1].as_f64().unwrap(), 1e-3), "curve at {}: {} vs {}", got[0], got[1], w[1]);
    }
    let out = a.output.as_ref().unwrap().rel_err;
    assert!(close(out, want["error"].as_f64().unwrap(), 1e-3));
    assert!(out <= figures.curve[0][1], "the chosen α is never worse than α = 0");
    // α = 0 gives s = 1: exactly plain round to nearest.
    let rtn = analyze(&w, &recipe(Method::Rtn, 3, 64)).unwrap();
    let plain = bitloupe::calib::output_error(&calib, w.values.view(), rtn.dequantized(&w).unwrap().view(), calib.reference_output(w.values.view()).as_deref());
    assert_eq!(figures.curve[0][1], plain.rel_err);
}

/// Source: GPTQ (Frantar et al., ICLR 2023), Algorithm 1 run column by column in float64 by
/// numpy. Our float32 lazy-batch version lands within 3 % of its output error (rounding
/// decisions on near-ties can differ), and both beat round to nearest by more than half.
#[test]
fn gptq_matches_numpy_and_clearly_beats_round_to_nearest() {
    let (w, calib) = case();
    let want = &expected()["gptq"];
    let a = analyze_with(&w, &recipe(Method::Gptq, 3, 64), Some(&calib), &mut |_, _| {}).unwrap();
    let gptq = a.output.as_ref().unwrap().rel_err;
    let rtn = analyze_with(&w, &recipe(Method::Rtn, 3, 64), Some(&calib), &mut |_, _| {}).unwrap();
    let rtn = rtn.output.as_ref().unwrap().rel_err;
    assert!(close(rtn, want["rtn_output_rel_err"].as_f64().unwrap(), 1e-4));
    assert!(close(gptq, want["output_rel_err"].as_f64().unwrap(), 0.03), "{gptq} vs numpy {}", want["output_rel_err"]);
    assert!(gptq < 0.5 * rtn, "GPTQ {gptq} vs round to nearest {rtn}");
    let ordered = analyze_with(&w, &Recipe { act_order: true, ..recipe(Method::Gptq, 3, 64) }, Some(&calib), &mut |_, _| {}).unwrap();
    assert!(ordered.output.as_ref().unwrap().rel_err < 0.5 * rtn);
}

/// Source: HQQ (Badri & Shaji 2023) per group in numpy: l_p errors to 1e-4 relative; HQQ never
/// ends above round to nearest and needs no calibration.
#[test]
fn hqq_matches_numpy_and_never_raises_the_lp_error() {
    let (w, _) = case();
    let want = &expected()["hqq"];
    let a = analyze(&w, &recipe(Method::Hqq, 3, 64)).unwrap();
    let MethodFigures::Hqq(h) = &a.method else { panic!("HQQ figures") };
    assert!(close(h.lp_before, want["lp_before"].as_f64().unwrap(), 1e-4), "{} vs {}", h.lp_before, want["lp_before"]);
    assert!(close(h.lp_after, want["lp_after"].as_f64().unwrap(), 1e-4), "{} vs {}", h.lp_after, want["lp_after"]);
    assert!(h.lp_after <= h.lp_before);
    assert_eq!(a.cost.zero_point_bits, a.cost.groups * 16, "real zero points stored as f16");
}

/// Source: the clipping search and the kept-weights rule written out in numpy; both agree
/// element by element.
#[test]
fn clipping_and_kept_weights_match_numpy_element_by_element() {
    let (w, _) = case();
    let clip = analyze(&w, &recipe(Method::Clip, 3, 64)).unwrap();
    assert!(*clip.dequantized(&w).unwrap() == open("method_clip_expected.npy").values);
    let keep = analyze(&w, &Recipe { keep_frac: 0.02, ..recipe(Method::Rtn, 4, 32) }).unwrap();
    assert!(*keep.dequantized(&w).unwrap() == open("method_keep_expected.npy").values);
    assert_eq!(keep.cost.kept_values, (0.02f64 * 24.0 * 192.0).round() as u64);
}

/// Bad calibration gets a clear error, and the weight-only analysis keeps working.
#[test]
fn bad_calibration_is_refused_and_weight_only_still_works() {
    let (w, _) = case();
    let narrow = open("quant_weight.npy"); // 300 columns, not 192
    let err = Calibration::from_tensor(&narrow, CalibKind::Sample, w.cols()).unwrap_err();
    assert!(err.to_string().contains("300 columns but the weight has 192"), "{err}");
    let needs = analyze(&w, &recipe(Method::Gptq, 4, 64)).unwrap_err();
    assert!(needs.to_string().contains("GPTQ needs calibration data"), "{needs}");
    let stats = Calibration::from_tensor(
        &Tensor::from_values("m", bitloupe::DType::F32, ndarray::Array2::ones((1, 192))),
        CalibKind::MeanAbs,
        192,
    )
    .unwrap();
    let sample_only = analyze_with(&w, &recipe(Method::Gptq, 4, 64), Some(&stats), &mut |_, _| {}).unwrap_err();
    assert!(sample_only.to_string().contains("activation sample"), "{sample_only}");
    let estimated = analyze_with(&w, &recipe(Method::Awq, 4, 64), Some(&stats), &mut |_, _| {}).unwrap();
    assert!(estimated.output.unwrap().estimated);
    assert!(analyze(&w, &Recipe::default()).is_ok());
}

/// The command line carries the same methods: the report gains `method`, `output_rel_err` and
/// the W8A8 study.
#[test]
fn command_line_runs_methods_with_calibration() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("r.json");
    let w = fixture("method_weight.npy");
    let x = fixture("method_acts.npy");
    let out = Command::new(env!("CARGO_BIN_EXE_bitloupe"))
        .args(["quantize", w.to_str().unwrap(), "--bits", "3", "--group", "64", "--method", "gptq", "--act-order", "--damp", "0.02"])
        .args(["--calib", x.to_str().unwrap(), "--w8a8", "token", "--smooth", "0.5", "--report", report.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let json: Value = serde_json::from_str(&std::fs::read_to_string(&report).unwrap()).unwrap();
    assert_eq!(json["method"]["name"], "gptq");
    assert_eq!(json["method"]["act_order"], true);
    assert!(json["output_rel_err"].as_f64().unwrap() > 0.0);
    assert!(json["smoothing"]["error_with"].as_f64().unwrap() < json["smoothing"]["error_without"].as_f64().unwrap());
    assert_eq!(json["cost"]["column_factor_bits"], 192 * 32);
    let bad = Command::new(env!("CARGO_BIN_EXE_bitloupe"))
        .args(["quantize", w.to_str().unwrap(), "--calib", fixture("quant_weight.npy").to_str().unwrap()])
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&bad.stderr);
    assert_eq!(bad.status.code(), Some(1));
    assert!(stderr.contains("calibration data cannot be used") && stderr.lines().count() == 1, "{stderr}");
}

/// Every scaled format works with the clipping search (never worse than its own round to
/// nearest) and with kept weights (which lower the error); codebooks with kept weights too.
#[test]
fn formats_work_with_clipping_and_kept_weights() {
    use bitloupe::formats::Format;
    let (w, calib) = case();
    let mse = |r: &Recipe| analyze(&w, r).unwrap().totals.mse;
    for format in [Format::Nf4, Format::E2m1, Format::E3m2, Format::E4m3, Format::Mxfp4, Format::Mxint8] {
        let base = Recipe::for_format(format);
        let rtn = mse(&base);
        let clip = mse(&Recipe { method: Method::Clip, ..base });
        let kept = mse(&Recipe { keep_frac: 0.02, ..base });
        assert!(clip <= rtn, "{format:?}: clip {clip} vs rtn {rtn}");
        assert!(kept < rtn, "{format:?}: kept {kept} vs rtn {rtn}");
        let gptq = analyze_with(&w, &Recipe { method: Method::Gptq, ..base }, Some(&calib), &mut |_, _| {}).unwrap();
        assert!(gptq.output.unwrap().rel_err.is_finite(), "{format:?} with GPTQ");
    }
    let book = Recipe::for_format(Format::Codebook);
    assert!(mse(&Recipe { keep_frac: 0.02, ..book }) < mse(&book));
    assert!(analyze(&w, &Recipe { method: Method::Clip, ..book }).unwrap_err().to_string().contains("codebook"));
}

/// Common practice for parallel numerics: the work is split into fixed blocks of rows whose
/// partial results are combined in row order, so the thread count cannot change a single bit.
#[test]
fn every_method_gives_the_same_result_on_one_thread_as_on_several() {
    use bitloupe::demo::Rng;
    use bitloupe::formats::Format;
    use ndarray::Array2;
    let mut rng = Rng::new(21);
    // 600 rows: nine full row blocks and a short one, and three GPTQ row chunks.
    let w = Tensor::from_values("w", bitloupe::DType::F32, Array2::from_shape_fn((600, 200), |_| rng.normal() as f32 * 0.05));
    let x = Array2::from_shape_fn((96, 200), |(_, c)| rng.normal() as f32 * if c == 7 { 20.0 } else { 1.0 });
    let calib = Calibration::from_sample(x);
    let mut recipes = vec![
        Recipe::default(),
        Recipe { granularity: Granularity::Tensor, ..Recipe::default() },
        Recipe { granularity: Granularity::Row, symmetric: true, bits: 3, ..Recipe::default() },
        recipe(Method::Clip, 3, 64),
        recipe(Method::Hqq, 4, 64),
        recipe(Method::Gptq, 4, 64),
        Recipe { act_order: true, ..recipe(Method::Gptq, 3, 32) },
        recipe(Method::Awq, 4, 64),
        Recipe { smooth: Some(0.5), keep_cols: 2, ..recipe(Method::Rtn, 4, 64) },
        Recipe { keep_frac: 0.01, ..recipe(Method::Rtn, 4, 64) },
        Recipe { double_quant: true, ..Recipe::for_format(Format::Nf4) },
    ];
    recipes.extend(["e2m1", "mxfp4", "mxint8", "codebook"].map(|f| Recipe::for_format(f.parse().unwrap())));
    let on = |threads: usize, r: &Recipe| {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
        pool.install(|| analyze_with(&w, r, Some(&calib), &mut |_, _| {}).unwrap())
    };
    for r in &recipes {
        let (one, three) = (on(1, r), on(3, r));
        assert!(one == three, "{} differs between one and three threads", r.label());
    }
    // The headline figures (a sweep's or a checkpoint report's row) are the full analysis's, bit
    // for bit, on any number of threads: also where, without calibration, the plain path keeps
    // no reconstruction, and where a method cannot run (the same message).
    let headline_on = |threads: usize, r: &Recipe, c: Option<&Calibration>| {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
        pool.install(|| headline(&w, r, c, &mut |_, _| {}).map(|h| (h.totals, h.cost, h.output)).map_err(|e| e.to_string()))
    };
    for r in &recipes {
        for c in [Some(&calib), None] {
            let full = analyze_with(&w, r, c, &mut |_, _| {}).map(|a| (a.totals, a.cost, a.output)).map_err(|e| e.to_string());
            for threads in [1, 3] {
                assert!(headline_on(threads, r, c) == full, "{} (calibration: {}) on {threads} threads", r.label(), c.is_some());
            }
        }
    }
    let empty = Tensor::from_values("e", bitloupe::DType::F32, Array2::zeros((0, 200)));
    let refused = headline(&empty, &Recipe::default(), None, &mut |_, _| {}).unwrap_err().to_string();
    assert_eq!(refused, analyze(&empty, &Recipe::default()).unwrap_err().to_string());
}
