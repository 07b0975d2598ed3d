//! The wasm boundary and the core, compiled for wasm32 and run under Node by wasm-bindgen-test.
//! Errors must arrive as JS errors with the core's message, never as panics.
#![cfg(target_arch = "wasm32")]

use bitloupe::wasm::{calibration_from_bytes, demo_weight, fits_beside_held, open_bytes, open_file, parse_text, recipe_defaults, take_panic_message, warm_up};
use bitloupe::{analyze, tensor, ReadOptions};
use wasm_bindgen::prelude::*;
use wasm_bindgen_test::*;

fn message(err: JsError) -> String {
    let value: JsValue = err.into();
    value.dyn_into::<js_sys::Error>().map(|e| String::from(e.message())).unwrap_or_default()
}

fn recipe(json: &str) -> JsValue {
    js_sys::JSON::parse(json).unwrap()
}

fn get(obj: &JsValue, key: &str) -> JsValue {
    js_sys::Reflect::get(obj, &JsValue::from_str(key)).unwrap()
}

const WEIGHT: &[u8] = include_bytes!("../fixtures/quant_weight.npy");
const EXPECTED_0: &[u8] = include_bytes!("../fixtures/quant_expected_0.npy");

/// Source: the numpy reference of `fixtures/make_fixtures.py`, case 0 (4-bit asymmetric, g128,
/// f16 scales): the same element-by-element agreement as the native cross-check, in wasm.
#[wasm_bindgen_test]
fn core_matches_the_numpy_reference_in_wasm() {
    let read = |bytes: &[u8]| {
        let listing = tensor::list(bytes, ReadOptions::default()).unwrap();
        tensor::read(bytes, listing.choose(None).unwrap()).unwrap()
    };
    let (weight, expected) = (read(WEIGHT), read(EXPECTED_0));
    let a = analyze(&weight, &bitloupe::Recipe::default()).unwrap();
    assert!(a.dequantized(&weight).unwrap().iter().zip(expected.values.iter()).all(|(g, w)| g == w));
}

#[path = "shared/small_float_casts.rs"]
mod small_float_casts;

/// The small-float kernels (wasm `simd128` lanes) against ml_dtypes' casts; see
/// `tests/shared/small_float_casts.rs`.
#[wasm_bindgen_test]
fn small_float_casts_match_ml_dtypes_in_wasm() {
    small_float_casts::check_small_float_casts(include_str!("../fixtures/manifest.json"));
}

#[wasm_bindgen_test]
fn the_boundary_runs_a_recipe_and_hands_out_typed_arrays() {
    // The page's first call after start: it must run the default recipe without an error.
    warm_up().unwrap();
    let defaults = recipe_defaults().unwrap();
    assert_eq!(get(&get(&defaults, "recipe"), "bits").as_f64(), Some(4.0));
    let handle = open_bytes(WEIGHT, None, false).unwrap();
    assert_eq!(get(&handle.info().unwrap(), "cols").as_f64(), Some(300.0));
    let analysis = handle.analyze(recipe(r#"{"bits": 3, "granularity": {"group": 64}, "symmetric": true, "scale_dtype": "bf16"}"#), None, None).unwrap();
    let summary = analysis.summary();
    assert_eq!(get(&summary, "label").as_string().unwrap(), "int3 sym g64 bf16");
    assert_eq!(analysis.group_mse().length(), 37 * 5);
    assert_eq!(analysis.column_max_abs().length(), 300);
    let report: serde_json::Value = serde_json::from_str(&analysis.report_json()).unwrap();
    assert_eq!(report["groups"]["mse"].as_array().unwrap().len(), 37 * 5);
    let hist = analysis.group_histogram(4, 10).unwrap();
    assert_eq!(get(&hist, "grid").dyn_into::<js_sys::Array>().unwrap().length(), 8);
    let counts = get(&get(&hist, "histogram"), "counts").dyn_into::<js_sys::Array>().unwrap();
    let total: f64 = counts.iter().map(|c| c.as_f64().unwrap()).sum();
    assert_eq!(total, 44.0, "group 4 is the short last group of row 0: 300 - 256 columns");
    let npy = analysis.dequantized_npy().unwrap();
    assert_eq!(npy.len(), 128 + 37 * 300 * 4);
    // The plain recipe's reconstruction is made again from the tensor, which the result holds on
    // to after the page has let go of the tensor's handle.
    drop(handle);
    assert_eq!(analysis.dequantized_npy().unwrap(), npy);
}

/// The page's file source (a `Blob` read with `FileReaderSync`; here the stand-ins over bytes in
/// memory that `bench/wasm_case.mjs` uses) fetches 32 MiB ranges ahead and serves the core's
/// reads from them: a tensor spanning more than one range reads as the same tensor as
/// its bytes opened whole, in a few fetches rather than one per read.
#[wasm_bindgen_test]
fn a_file_read_through_ranges_fetched_ahead_is_the_same_tensor() {
    let (rows, cols) = (4200usize, 4096usize); // 33 MiB of f16: one range and part of another
    let dict = format!("{{'descr': '<f2', 'fortran_order': False, 'shape': ({rows}, {cols}), }}");
    let header = format!("{dict}{}\n", " ".repeat(63 - (10 + dict.len()) % 64));
    let mut bytes = b"\x93NUMPY\x01\x00".to_vec();
    bytes.extend((header.len() as u16).to_le_bytes());
    bytes.extend(header.as_bytes());
    let mut s = 2024u32;
    for _ in 0..rows * cols {
        s = s.wrapping_mul(1103515245).wrapping_add(12345);
        // Finite binary16 values of magnitudes 2^-10 … 2^9, both signs.
        let bits = ((s >> 31) << 15) | ((5 + (s >> 20) % 20) << 10) | (s & 0x3ff);
        bytes.extend((bits as u16).to_le_bytes());
    }
    js_sys::eval(
        "globalThis.RangeBlob = class RangeBlob {
           constructor(whole, start = 0, end = whole.length) { Object.assign(this, { whole, start, end }); }
           get size() { return this.end - this.start; }
           slice(from, to) { return new RangeBlob(this.whole, this.start + from, this.start + to); }
         };
         globalThis.fetches = 0;
         globalThis.FileReaderSync = class {
           readAsArrayBuffer(blob) { globalThis.fetches += 1; return blob.whole.slice(blob.start, blob.end).buffer; }
         };",
    )
    .unwrap();
    let make = js_sys::Function::new_with_args("bytes", "return new RangeBlob(bytes)");
    let blob = make.call1(&JsValue::NULL, &js_sys::Uint8Array::from(&bytes[..])).unwrap();
    // As a dropped `File`: an array with no name of its own takes the file's, less the extension.
    js_sys::Reflect::set(&blob, &JsValue::from_str("name"), &JsValue::from_str("block.7.up.npy")).unwrap();
    let from_blob = open_file(blob.unchecked_into(), None, false).unwrap();
    assert_eq!(get(&from_blob.info().unwrap(), "name").as_string().as_deref(), Some("block.7.up"));
    let fetches = js_sys::Reflect::get(&js_sys::global(), &JsValue::from_str("fetches")).unwrap().as_f64().unwrap();
    assert!(fetches <= 6.0, "{fetches} fetches for 17 reads of tensor data");
    let whole = open_bytes(&bytes, None, false).unwrap();
    let mse = |t: &bitloupe::wasm::TensorHandle| t.analyze(recipe("{}"), None, None).unwrap().group_mse().to_vec();
    let (a, b) = (mse(&from_blob), mse(&whole));
    assert_eq!(a.len(), rows * cols / 128);
    assert!(a.iter().zip(&b).all(|(x, y)| x.to_bits() == y.to_bits()), "the same figures for every group");
}

#[wasm_bindgen_test]
fn the_demo_weight_costs_4_15625_bits_at_the_default_recipe() {
    let analysis = demo_weight().analyze(JsValue::UNDEFINED, None, None).unwrap();
    assert_eq!(get(&analysis.summary(), "bits_per_weight").as_f64(), Some(4.15625));
    assert_eq!(analysis.group_mse().length(), 1024 * 32);
}

#[wasm_bindgen_test]
fn bad_inputs_become_js_errors_with_the_core_message() {
    let expect = |err: Option<JsError>, needle: &str| {
        let text = message(err.expect("an error"));
        assert!(text.contains(needle), "expected '{needle}' in '{text}'");
    };
    expect(parse_text("1 2 3\n4 5").err(), "line 2, column 1");
    expect(open_bytes(&WEIGHT[..WEIGHT.len() - 7], None, false).err(), "truncated");
    expect(open_bytes(b"hello", None, false).err(), "magic");
    let handle = parse_text("1 nan\n2 3").unwrap();
    expect(handle.analyze(JsValue::UNDEFINED, None, None).err(), "1 NaN");
    let ok = parse_text("1 2\n3 4").unwrap();
    expect(ok.analyze(recipe(r#"{"bits": 12}"#), None, None).err(), "12 bits");
    expect(ok.analyze(recipe(r#"{"bitz": 4}"#), None, None).err(), "invalid recipe");
}

const METHOD_WEIGHT: &[u8] = include_bytes!("../fixtures/method_weight.npy");
const METHOD_ACTS: &[u8] = include_bytes!("../fixtures/method_acts.npy");

/// GPTQ and the smoothing study through the boundary, in wasm: the same figures as natively
/// (the numpy cross-checks of tests/methods.rs hold there).
#[wasm_bindgen_test]
fn calibration_methods_run_in_wasm() {
    let w = open_bytes(METHOD_WEIGHT, None, false).unwrap();
    let calib = calibration_from_bytes(METHOD_ACTS, None, "sample", 192).unwrap();
    let gptq = w.analyze_with_calibration(recipe(r#"{"bits": 3, "granularity": {"group": 64}, "method": "gptq"}"#), None, &calib).unwrap();
    let rtn = w.analyze_with_calibration(recipe(r#"{"bits": 3, "granularity": {"group": 64}}"#), None, &calib).unwrap();
    let out = |a: &bitloupe::wasm::AnalysisHandle| get(&a.summary(), "output_rel_err").as_f64().unwrap();
    assert!(out(&gptq) < 0.5 * out(&rtn), "GPTQ {} vs RTN {}", out(&gptq), out(&rtn));
    assert_eq!(gptq.output_row_err().length(), 24);
    let study = w.smoothing_study(&calib, 0.5, "token", None).unwrap();
    assert!(get(&study, "error_with").as_f64().unwrap() < get(&study, "error_without").as_f64().unwrap());
    let narrow = calibration_from_bytes(METHOD_ACTS, None, "sample", 300).err().unwrap();
    assert!(message(narrow).contains("192 columns but the weight has 300"));
}

/// Rust aborts once an allocation fails, and in WebAssembly that abort is a bare trap with no
/// message; the allocator remembers the request so the page can say that memory ran out (in the
/// words the compute worker's out-of-memory pattern looks for).
#[wasm_bindgen_test]
fn a_failed_allocation_is_reported_with_its_size() {
    let _ = take_panic_message();
    // Two requests of 2 GiB less 64 KiB: the first fits the 4 GiB a wasm32 memory can address
    // (WebAssembly core specification: 32-bit memory indices), the second not beside it and the
    // module's own stack and data. Untouched, the pages cost the test no resident memory.
    let bytes = (1usize << 31) - (1 << 16);
    let (mut held, mut more) = (Vec::<u8>::new(), Vec::<u8>::new());
    held.try_reserve_exact(bytes).unwrap();
    assert!(more.try_reserve_exact(bytes).is_err());
    assert_eq!(take_panic_message(), Some(format!("memory allocation of {bytes} bytes failed")));
    assert_eq!(take_panic_message(), None, "a failure is reported once");
}

/// The worker asks whether a tensor about to be read fits beside what the page holds, with its
/// first run: the core's estimate (`footprint`) against what the 4 GiB memory has left.
#[wasm_bindgen_test]
fn a_tensor_fits_beside_what_is_held_by_the_estimate_of_its_first_run() {
    let plain = recipe("{}");
    let gptq = recipe(r#"{"method": "gptq"}"#);
    assert!(fits_beside_held(vec![4096, 4096], plain.clone()));
    // 30000 × 16384 is 1.83 GiB as f32: beside it the plain recipe's groups and sums fit, GPTQ's
    // two square matrices of 16384² f32 (1 GiB each) do not.
    assert!(fits_beside_held(vec![30000, 16384], plain));
    assert!(!fits_beside_held(vec![30000, 16384], gptq));
    // Holding 2 GiB leaves no room for such a tensor (untouched, the pages cost no resident memory).
    let mut held = Vec::<u8>::new();
    held.try_reserve_exact((1 << 31) - (1 << 16)).unwrap();
    assert!(!fits_beside_held(vec![30000, 16384], recipe("{}")));
    drop(held);
    // What cannot be read or run is left to the reading and the run, which say why.
    assert!(fits_beside_held(vec![1 << 20, 1 << 20], recipe("{}")));
    assert!(fits_beside_held(vec![30000, 16384], recipe(r#"{"method": "gptq", "granularity": {"group": 0}}"#)));
}
