//! The `bitloupe` command as a user runs it: listings, reports, outputs, and one clear line and
//! a non-zero exit for every bad input, with no partial output left behind.

use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../fixtures").join(name)
}

fn bitloupe(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_bitloupe")).args(args).output().unwrap()
}

fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

fn path_str(p: &Path) -> &str {
    p.to_str().unwrap()
}

#[test]
fn inspect_lists_every_tensor_of_a_safetensors_file() {
    let out = bitloupe(&["inspect", path_str(&fixture("multi.safetensors"))]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    assert!(stdout.starts_with("8 tensor(s)"), "{stdout}");
    for name in ["block.0.attn.k.weight", "block.2.conv", "block.10.norm.scale"] {
        assert!(stdout.contains(name), "{name} missing from:\n{stdout}");
    }
    assert!(stdout.contains("bf16") && stdout.contains("[2, 3, 2]"), "{stdout}");
}

/// Source: the numpy reference of `fixtures/make_fixtures.py` (quantization case 0:
/// 4-bit asymmetric, groups of 128, f16 scales).
#[test]
fn quantize_writes_the_dequantized_tensor_and_the_json_report() {
    let dir = tempfile::tempdir().unwrap();
    let deq = dir.path().join("deq.npy");
    let report = dir.path().join("report.json");
    let input = fixture("quant_weight.npy");
    let out = bitloupe(&[
        "quantize", path_str(&input), "--bits", "4", "--group", "128", "--asym", "--scale-dtype", "f16",
        "--out", path_str(&deq), "--report", path_str(&report),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert_eq!(std::fs::read(&deq).unwrap()[128..], std::fs::read(fixture("quant_expected_0.npy")).unwrap()[128..]);
    let json: Value = serde_json::from_str(&std::fs::read_to_string(&report).unwrap()).unwrap();
    let manifest: Value = serde_json::from_str(&std::fs::read_to_string(fixture("manifest.json")).unwrap()).unwrap();
    let expected = &manifest["quantization"][0];
    assert_eq!(json["schema"], "bitloupe.report/1");
    assert_eq!(json["tensor"]["shape"], serde_json::json!([37, 300]));
    assert_eq!(json["tensor"]["dtype"], "f32");
    assert_eq!(json["total_bits"], expected["total_bits"]);
    assert_eq!(json["bits_per_weight"], expected["bits_per_weight"]);
    assert_eq!(json["bytes"].as_u64().unwrap(), expected["total_bits"].as_u64().unwrap().div_ceil(8));
    for key in ["mse", "sqnr_db", "rel_fro_err", "max_abs_err"] {
        let (got, want) = (json[key].as_f64().unwrap(), expected[key].as_f64().unwrap());
        assert!((got - want).abs() <= 1e-6 * want.abs(), "{key}: {got} vs {want}");
    }
    assert_eq!(json["groups"]["rows"], 37);
    assert_eq!(json["groups"]["per_row"], 3);
    assert_eq!(json["groups"]["mse"].as_array().unwrap().len(), 111);
    assert!(json["caution"].as_str().unwrap().contains("proxy"));
    assert_eq!(json["outlier_column_count"], 3, "the fixture has three 9x columns");
}

#[test]
fn quantize_prints_a_summary_without_report_and_picks_tensors_by_name() {
    let out = bitloupe(&["quantize", path_str(&fixture("multi.safetensors")), "--tensor", "block.0.mlp.up.weight", "--bits", "8", "--group", "row", "--sym"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    assert!(stdout.contains("int8 sym per-row f16") && stdout.contains("SQNR") && stdout.contains("bits/weight"), "{stdout}");
}

#[test]
fn text_matrices_and_the_demo_weight_are_accepted() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("small.csv");
    std::fs::write(&csv, "0.1, -0.2, 0.3\n0.4, 0.5, -0.6\n").unwrap();
    let out = bitloupe(&["quantize", path_str(&csv), "--group", "tensor"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let demo = dir.path().join("demo.npy");
    let out = bitloupe(&["demo", "--out", path_str(&demo)]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert_eq!(std::fs::metadata(&demo).unwrap().len(), 128 + 4 * 1024 * 4096);
}

/// Every bad input: exit code 1, exactly one line on stderr, no panic, and no output file.
#[test]
fn bad_inputs_fail_with_one_clear_line_and_write_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let truncated = dir.path().join("truncated.npy");
    let full = std::fs::read(fixture("quant_weight.npy")).unwrap();
    std::fs::write(&truncated, &full[..full.len() - 100]).unwrap();
    let bad_header = dir.path().join("bad.safetensors");
    std::fs::write(&bad_header, b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all").unwrap();
    let ragged = dir.path().join("ragged.txt");
    std::fs::write(&ragged, "1 2 3\n4 5\n").unwrap();
    let nan = dir.path().join("nan.csv");
    std::fs::write(&nan, "1, 2\nnan, 4\n").unwrap();
    let weight = fixture("quant_weight.npy");
    let multi = fixture("multi.safetensors");
    let object = fixture("npy_object.npy");
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["quantize", "/no/such/file.npy"], "cannot open"),
        (vec!["quantize", path_str(&truncated)], "truncated"),
        (vec!["quantize", path_str(&bad_header)], "not valid JSON"),
        (vec!["quantize", path_str(&object)], "not supported"),
        (vec!["quantize", path_str(&multi), "--tensor", "nope"], "no tensor named 'nope'"),
        (vec!["quantize", path_str(&multi)], "choose one"),
        (vec!["quantize", path_str(&weight), "--bits", "9"], "9 bits"),
        (vec!["quantize", path_str(&weight), "--group", "3"], "group size 3"),
        (vec!["quantize", path_str(&weight), "--group", "lots"], "not a size"),
        (vec!["quantize", path_str(&weight), "--scale-dtype", "f8"], "scale type"),
        (vec!["quantize", path_str(&ragged)], "line 2, column 1"),
        (vec!["quantize", path_str(&nan)], "1 NaN"),
        (vec!["quantize", path_str(&multi), "--tensor", "block.0.mlp.up.weight", "--out", "/no/such/dir/x.npy"], "cannot write"),
    ];
    for (mut args, needle) in cases {
        let deq = dir.path().join("never.npy");
        let report = dir.path().join("never.json");
        if !args.contains(&"--out") {
            args.extend(["--out", path_str(&deq)]);
        }
        args.extend(["--report", path_str(&report)]);
        let out = bitloupe(&args);
        let stderr = text(&out.stderr);
        assert_eq!(out.status.code(), Some(1), "{args:?}: {stderr}");
        assert_eq!(stderr.lines().count(), 1, "{args:?}: {stderr}");
        assert!(stderr.contains(needle), "{args:?}: expected '{needle}' in: {stderr}");
        assert!(!stderr.contains("panicked"));
        assert!(!deq.exists() && !report.exists(), "{args:?} left an output behind");
        let leftovers: Vec<_> = std::fs::read_dir(dir.path()).unwrap().filter_map(|e| e.ok()).filter(|e| e.file_name().to_string_lossy().contains("partial")).collect();
        assert!(leftovers.is_empty(), "{args:?} left a partial file");
    }
}

/// `sweep` writes one row per sensible recipe with the listed columns; each row's figures equal
/// a single `quantize` of the same recipe (no shortcut changes a figure); the front is marked.
#[test]
fn sweep_rows_equal_single_analyses_and_mark_the_front() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("sweep.csv");
    let json = dir.path().join("sweep.json");
    let w = fixture("method_weight.npy");
    let x = fixture("method_acts.npy");
    let out = bitloupe(&[
        "sweep", path_str(&w), "--calib", path_str(&x), "--bits", "3,4", "--group", "32,64,row", "--format", "int,nf4,mxfp4",
        "--method", "rtn,clip,gptq", "--csv", path_str(&csv), "--json", path_str(&json),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let table = std::fs::read_to_string(&csv).unwrap();
    let mut lines = table.lines();
    assert_eq!(lines.next().unwrap(), "format,bits,group,method,scale_dtype,label,bits_per_weight,sqnr_db,mse,output_rel_err,pareto");
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    assert!(rows.iter().any(|r| r[10] == "true") && rows.iter().any(|r| r[10] == "false"));
    assert!(rows.iter().all(|r| !r[9].is_empty()), "output error filled in with calibration");
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert_eq!(doc["pareto_by"], "output");
    assert!(doc["skipped"].as_u64().unwrap() > 0, "mxfp4 with groups other than 32 is skipped");
    // Every sweep row against its own single analysis.
    for row in &rows {
        let report = dir.path().join("one.json");
        let mut args = vec!["quantize", path_str(&w), "--calib", path_str(&x), "--format", row[0], "--group", row[2], "--method", row[3], "--report", path_str(&report)];
        if row[0] == "int" {
            args.extend(["--bits", row[1]]);
        }
        let single = bitloupe(&args);
        assert!(single.status.success(), "{row:?}: {}", text(&single.stderr));
        let one: Value = serde_json::from_str(&std::fs::read_to_string(&report).unwrap()).unwrap();
        assert_eq!(one["bits_per_weight"].as_f64().unwrap().to_string(), row[6], "{row:?}");
        // Matrix products may sum in another order when their buffers sit at other addresses
        // (faer picks kernels by alignment), so GPTQ's figures agree to rounding noise.
        for (key, column) in [("mse", 8), ("output_rel_err", 9)] {
            let (a, b) = (one[key].as_f64().unwrap(), row[column].parse::<f64>().unwrap());
            assert!((a - b).abs() <= 1e-9 * b.abs(), "{row:?} {key}: {a} vs {b}");
        }
    }
}

/// `quantize --packed` then `unpack` gives back exactly the `--out` tensor (byte for byte in the
/// .npy), and a damaged packed file is refused with one line.
#[test]
fn packed_export_unpacks_to_the_dequantized_tensor() {
    let dir = tempfile::tempdir().unwrap();
    let w = fixture("quant_weight.npy");
    for flags in [vec!["--bits", "3", "--group", "64"], vec!["--format", "nf4", "--double-quant"], vec!["--format", "mxfp4", "--keep-frac", "0.01"]] {
        let (deq, packed, back) = (dir.path().join("deq.npy"), dir.path().join("p.safetensors"), dir.path().join("back.npy"));
        let mut args = vec!["quantize", path_str(&w), "--out", path_str(&deq), "--packed", path_str(&packed), "--report", "/dev/null"];
        args.extend(flags.iter());
        let out = bitloupe(&args);
        assert!(out.status.success(), "{flags:?}: {}", text(&out.stderr));
        let out = bitloupe(&["unpack", path_str(&packed), "--out", path_str(&back)]);
        assert!(out.status.success(), "{}", text(&out.stderr));
        assert!(std::fs::read(&back).unwrap() == std::fs::read(&deq).unwrap(), "{flags:?}: the unpacked .npy differs from --out");
    }
    let packed = std::fs::read(dir.path().join("p.safetensors")).unwrap();
    let cut = dir.path().join("cut.safetensors");
    std::fs::write(&cut, &packed[..packed.len() - 9]).unwrap();
    let out = bitloupe(&["unpack", path_str(&cut), "--out", path_str(&dir.path().join("never.npy"))]);
    assert_eq!(out.status.code(), Some(1));
    assert_eq!(text(&out.stderr).lines().count(), 1);
    assert!(!dir.path().join("never.npy").exists());
}
