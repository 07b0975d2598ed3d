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
    // Raw 2-byte values read as bfloat16 with --bf16: 0x3F80 is 1.0 and 0xC000 is −2.0 (the
    // bfloat16 layout: the top half of an IEEE 754 binary32).
    let raw = dir.path().join("raw.npy");
    let mut bytes = npy_bytes("{'descr': '<u2', 'fortran_order': False, 'shape': (1, 2), }\n");
    bytes.extend_from_slice(&[0x80, 0x3F, 0x00, 0xC0]);
    std::fs::write(&raw, bytes).unwrap();
    let out = bitloupe(&["quantize", path_str(&raw), "--bf16", "--group", "row"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(text(&out.stdout).contains("bf16  [1, 2]"), "{}", text(&out.stdout));
    // 4 + (16 + 4)/128 = 4.15625 bits per weight, a tie at four places: shown as the page
    // shows it (JavaScript's toFixed rounds a tie up), in the summary and the Markdown alike.
    let markdown = dir.path().join("demo.md");
    let out = bitloupe(&["quantize", path_str(&demo), "--markdown", path_str(&markdown)]);
    assert!(text(&out.stdout).contains("4.1563 bits/weight"), "{}", text(&out.stdout));
    assert!(std::fs::read_to_string(&markdown).unwrap().contains("| bits per weight | 4.1563 |"));
}

/// A `.safetensors` file: the header's length (u64 little-endian), the header, then `data`
/// (the layout of the format's description).
fn safetensors_bytes(header: &str, data: &[u8]) -> Vec<u8> {
    let mut out = (header.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(header.as_bytes());
    out.extend_from_slice(data);
    out
}

/// A version 1.0 `.npy` file with this header dict and no data (NEP 1's layout, unpadded).
fn npy_bytes(header: &str) -> Vec<u8> {
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&(header.len() as u16).to_le_bytes());
    out.extend_from_slice(header.as_bytes());
    out
}

/// Every bad input: exit code 1, exactly one line on stderr naming the problem, no panic, and
/// no output file. Each case is a row of the README's "Bad inputs" table.
#[test]
fn bad_inputs_fail_with_one_clear_line_and_write_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let write = |name: &str, bytes: &[u8]| {
        let path = dir.path().join(name);
        std::fs::write(&path, bytes).unwrap();
        path
    };
    let full = std::fs::read(fixture("quant_weight.npy")).unwrap();
    let truncated = write("truncated.npy", &full[..full.len() - 100]);
    let empty = write("empty.npy", b"");
    let wrong_magic = write("picture.npy", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR");
    let mut future = full.clone();
    future[6] = 9;
    let future_version = write("future.npy", &future);
    let bad_header = write("bad.safetensors", b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all");
    let mut claims = (1u64 << 40).to_le_bytes().to_vec();
    claims.extend_from_slice(b"{}");
    let huge_header = write("huge-header.safetensors", &claims);
    let lying = write("lying.safetensors", &safetensors_bytes(r#"{"w":{"dtype":"F32","shape":[3],"data_offsets":[0,8]}}"#, &[0; 8]));
    let past_end = write("past-end.safetensors", &safetensors_bytes(r#"{"w":{"dtype":"F32","shape":[4],"data_offsets":[0,16]}}"#, &[0; 8]));
    let overlapping = write(
        "overlap.safetensors",
        &safetensors_bytes(r#"{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8]},"b":{"dtype":"F32","shape":[2],"data_offsets":[4,12]}}"#, &[0; 12]),
    );
    let twice = write(
        "twice.safetensors",
        &safetensors_bytes(r#"{"w":{"dtype":"F32","shape":[1],"data_offsets":[0,4]},"w":{"dtype":"F32","shape":[1],"data_offsets":[4,8]}}"#, &[0; 8]),
    );
    let no_tensors = write("none.safetensors", &safetensors_bytes(r#"{"__metadata__":{"note":"empty"}}"#, &[]));
    let line_break = write("line-break.safetensors", &safetensors_bytes("{\"odd\\nname\":{\"dtype\":\"F32\",\"shape\":[1],\"data_offsets\":[0,4]}}", &[0; 4]));
    // 2^32 + 2 f32 elements (16 GiB) in a sparse file: refused from the header, nothing allocated.
    let elements: u64 = (1 << 32) + 2;
    let header = format!(r#"{{"huge":{{"dtype":"F32","shape":[2,{}],"data_offsets":[0,{}]}}}}"#, elements / 2, elements * 4);
    let huge = write("huge.safetensors", &safetensors_bytes(&header, &[]));
    std::fs::OpenOptions::new().write(true).open(&huge).unwrap().set_len(8 + header.len() as u64 + elements * 4).unwrap();
    let no_elements = write("no-elements.npy", &npy_bytes("{'descr': '<f4', 'fortran_order': False, 'shape': (5, 0), }"));
    let vast_nothing = write("vast-nothing.npy", &npy_bytes("{'descr': '<f4', 'fortran_order': False, 'shape': (0, 8589934592), }"));
    let ragged = write("ragged.txt", b"1 2 3\n4 5\n");
    let not_a_number = write("word.csv", b"1, 2\n3, four\n");
    let unclosed = write("unclosed.txt", b"[[1, 2], [3, 4]");
    let nothing = write("comments.txt", b"# only a comment\n");
    let nan = write("nan.csv", b"1, 2\nnan, 4\n");
    let inf = write("inf.csv", b"1, inf\n2, -inf\n");
    let calib_nan = write("acts-nan.csv", &b"0.5, ".repeat(299).into_iter().chain(b"nan\n".iter().copied()).collect::<Vec<u8>>());
    let weight = fixture("quant_weight.npy");
    let multi = fixture("multi.safetensors");
    let object = fixture("npy_object.npy");
    let structured = fixture("npy_structured.npy");
    let acts = fixture("method_acts.npy");
    let cube = fixture("npy_3d_fortran.npy");
    let same = dir.path().join("both.npy");
    let a_directory = dir.path().join("a-directory");
    std::fs::create_dir(&a_directory).unwrap();
    let p = path_str;
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["quantize", "/no/such/file.npy"], "cannot open"),
        (vec!["quantize", p(&empty)], "not a valid tensor file: the file is empty"),
        (vec!["quantize", p(&wrong_magic)], "starts neither with the NumPy .npy magic nor with a safetensors header"),
        (vec!["quantize", p(&future_version)], "format version 9.0 is unknown"),
        (vec!["quantize", p(&truncated)], "the file is truncated: the array data needs 44528 bytes but the file has only 44428"),
        (vec!["quantize", p(&bad_header)], "not valid JSON"),
        (vec!["quantize", p(&huge_header)], "the header claims 1099511627776 bytes, more than the 100000000 allowed"),
        (vec!["quantize", p(&lying)], "tensor 'w' has 8 bytes of data but its shape [3] of F32 needs 12"),
        (vec!["quantize", p(&past_end)], "the tensor data needs 79 bytes but the file has only 71"),
        (vec!["quantize", p(&overlapping)], "tensors 'a' and 'b' overlap"),
        (vec!["quantize", p(&twice)], "the name 'w' appears twice"),
        (vec!["quantize", p(&line_break), "--tensor", "nope"], "the file has: odd\\nname"),
        (vec!["quantize", p(&huge)], "its 4294967298 elements need 16.0 GiB as f32"),
        (vec!["quantize", p(&no_elements)], "shape [5, 0] cannot be analysed: it has no elements"),
        (vec!["quantize", p(&vast_nothing)], "holds no elements, but its other axes span 8589934592"),
        (vec!["quantize", p(&object)], "object arrays hold Python objects"),
        (vec!["quantize", p(&structured)], "structured (record) arrays have no single number type"),
        (vec!["quantize", p(&multi), "--tensor", "nope"], "no tensor named 'nope'"),
        (vec!["quantize", p(&multi)], "choose one"),
        (vec!["quantize", p(&weight), "--tensor", "w"], "no tensor named 'w'; the file's one tensor has no name (a .npy file): leave the name out"),
        (vec!["quantize", p(&no_tensors)], "the file holds no tensors"),
        (vec!["quantize", p(&no_tensors), "--tensor", "w"], "no tensor named 'w'; the file holds no tensors"),
        (vec!["quantize", p(&weight), "--bits", "9"], "9 bits"),
        (vec!["quantize", p(&weight), "--group", "3"], "group size 3"),
        (vec!["quantize", p(&weight), "--group", "lots"], "not a size"),
        (vec!["quantize", p(&weight), "--scale-dtype", "f8"], "scale type"),
        (vec!["quantize", p(&ragged)], "line 2, column 1: this row has 2 values but the first row has 3"),
        (vec!["quantize", p(&not_a_number)], "line 2, column 4: 'four' is not a number"),
        (vec!["quantize", p(&unclosed)], "the list is not closed"),
        (vec!["quantize", p(&nothing)], "no numbers found"),
        (vec!["quantize", p(&nan)], "1 NaN and 0 infinite values (first at row 1, column 0)"),
        (vec!["quantize", p(&inf)], "0 NaN and 2 infinite values (first at row 0, column 1)"),
        (vec!["quantize", p(&weight), "--calib", p(&acts)], "it has 192 columns but the weight has 300 input columns"),
        (vec!["quantize", p(&weight), "--calib", p(&calib_nan)], "it holds 1 NaN and 0 infinite values"),
        (vec!["quantize", p(&weight), "--calib", p(&cube)], "flatten batch and sequence first"),
        (vec!["quantize", p(&weight), "--calib", p(&weight), "--calib-kind", "maxabs"], "per-column statistics must be one vector"),
        (vec!["unpack", p(&multi)], "no bitloupe.packed/1 metadata"),
        (vec!["unpack", p(&weight)], "not a valid safetensors file"),
        (vec!["quantize", p(&multi), "--tensor", "block.0.mlp.up.weight", "--out", "/no/such/dir/x.npy"], "cannot write"),
        (vec!["quantize", p(&weight), "--double-quant"], "double quantization applies to NF4"),
        (vec!["quantize", p(&weight), "--format", "nf4", "--bits", "3"], "--bits applies to the int and codebook formats (nf4 fixes its own width) only"),
        (vec!["quantize", p(&weight), "--damp", "0.1"], "--damp applies to GPTQ (--method gptq) only"),
        (vec!["quantize", p(&weight), "--method", "awq", "--act-order"], "--act-order applies to GPTQ"),
        (vec!["quantize", p(&weight), "--method", "gptq", "--awq-clip"], "--awq-clip applies to AWQ (--method awq) only"),
        (vec!["demo", "--out", p(&same), "--activations", p(&same)], "given for two outputs"),
        (vec!["quantize", p(&weight), "--out", p(&a_directory)], "is a directory"),
        // The rename would put the result in place of the source.
        (vec!["quantize", p(&weight), "--out", p(&weight)], "is the input"),
        (vec!["quantize", p(&weight), "--bf16"], "--bf16 reads raw 2-byte .npy values as bfloat16, and the files read hold f32; leave it out"),
    ];
    let source = std::fs::read(&weight).unwrap();
    for (mut args, needle) in cases {
        assert!(!same.exists(), "an earlier case left {same:?}");
        let deq = dir.path().join("never.npy");
        let report = dir.path().join("never.json");
        if !args.contains(&"--out") {
            args.extend(["--out", p(&deq)]);
        }
        if args[0] == "quantize" {
            args.extend(["--report", p(&report)]);
        }
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
    assert_eq!(std::fs::read(&weight).unwrap(), source, "the source weight was changed");
}

/// '-' sends the JSON report to standard output (after any file output is in place), and an
/// output path that is a symbolic link writes the link's target and keeps the link: common
/// practice for command-line tools.
#[test]
fn report_to_standard_output_and_outputs_through_links() {
    let dir = tempfile::tempdir().unwrap();
    let weight = fixture("quant_weight.npy");
    let out = bitloupe(&["quantize", path_str(&weight), "--report", "-"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).expect("the report is JSON on standard output");
    assert_eq!(report["schema"], "bitloupe.report/1");
    assert!(report["mse"].as_f64().unwrap() > 0.0);
    assert!(!Path::new("-").exists(), "no file named '-'");

    let target = dir.path().join("target.npy");
    std::fs::write(&target, b"old").unwrap();
    let link = dir.path().join("link.npy");
    std::os::unix::fs::symlink(&target, &link).unwrap();
    let out = bitloupe(&["quantize", path_str(&weight), "--out", path_str(&link)]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(std::fs::symlink_metadata(&link).unwrap().file_type().is_symlink(), "the link stays a link");
    assert!(std::fs::read(&target).unwrap().starts_with(b"\x93NUMPY"), "the target holds the new tensor");
    // A link to a missing file creates that file.
    let dangling = dir.path().join("dangling.npy");
    std::os::unix::fs::symlink("created.npy", &dangling).unwrap();
    assert!(bitloupe(&["quantize", path_str(&weight), "--out", path_str(&dangling)]).status.success());
    assert!(std::fs::symlink_metadata(&dangling).unwrap().file_type().is_symlink());
    assert!(std::fs::read(dir.path().join("created.npy")).unwrap().starts_with(b"\x93NUMPY"));
    // /dev/stdout is this process's output, written through it: the Markdown, then the summary.
    let out = bitloupe(&["quantize", path_str(&weight), "--markdown", "/dev/stdout"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let printed = text(&out.stdout);
    let (markdown, summary) = (printed.find("### Quantizing").unwrap(), printed.find("\nrecipe ").unwrap());
    assert!(markdown < summary, "{printed}");
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
    // Why, by reason: MXFP4 in groups of 64 and per row, each with three methods (clipping and
    // GPTQ run on MXFP4's block of 32).
    let why = doc["skipped_why"].as_array().unwrap();
    assert_eq!(why.iter().map(|r| r["count"].as_u64().unwrap()).sum::<u64>(), doc["skipped"].as_u64().unwrap());
    let mx = why.iter().find(|r| r["why"].as_str().unwrap().starts_with("mxfp4 shares one scale per block of 32")).expect("the mxfp4 reason");
    assert_eq!(mx["count"], 6, "{why:?}");
    assert!(text(&out.stderr).contains("combinations skipped: mxfp4 shares one scale per block of 32"), "{}", text(&out.stderr));
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

/// A .safetensors file written with bitloupe's own writer: (name, F32 shape, values) each, plus
/// optional extra tensors of other types, as (name, dtype, shape, bytes).
fn write_checkpoint(path: &Path, floats: &[(&str, Vec<usize>, Vec<f32>)], others: &[(&str, &'static str, Vec<usize>, Vec<u8>)]) {
    use bitloupe::tensor::safetensors::{write, Outgoing};
    let mut tensors: Vec<Outgoing> = floats
        .iter()
        .map(|(name, shape, values)| Outgoing { name, dtype: "F32", shape: shape.clone(), data: values.iter().flat_map(|v| v.to_le_bytes()).collect() })
        .collect();
    tensors.extend(others.iter().map(|(name, dtype, shape, data)| Outgoing { name, dtype, shape: shape.clone(), data: data.clone() }));
    std::fs::write(path, write(&tensors, &Default::default())).unwrap();
}

fn normal_values(count: usize, seed: u64, scale: f32) -> Vec<f32> {
    let mut rng = bitloupe::demo::Rng::new(seed);
    (0..count).map(|_| rng.normal() as f32 * scale).collect()
}

/// `report` over two files: every quantized row equals a single `quantize --report` of the same
/// tensor (bits per weight, bits and MSE to the last digit), the totals equal the sums computed
/// here from those single reports and the written values (definitions: `report --help`), and
/// the CSV carries the same rows and a total row.
#[test]
fn report_rows_equal_single_quantizations_and_totals_their_sums() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (dir.path().join("a.safetensors"), dir.path().join("b.safetensors"));
    let tensors_a = [("layers.0.proj.weight", vec![24, 96], normal_values(24 * 96, 1, 0.02)), ("layers.0.norm.weight", vec![96], normal_values(96, 2, 1.0))];
    // A second scale, 50x larger, so that the weighted totals differ from plain means.
    let tensors_b = [("layers.1.proj.weight", vec![40, 64], normal_values(40 * 64, 3, 1.0)), ("layers.1.conv.weight", vec![8, 2, 48], normal_values(8 * 96, 4, 0.02))];
    write_checkpoint(&a, &tensors_a, &[("layers.0.position", "I8", vec![4], vec![0, 1, 2, 3])]);
    write_checkpoint(&b, &tensors_b, &[]);
    let (json, csv) = (dir.path().join("r.json"), dir.path().join("r.csv"));
    let recipe = ["--bits", "3", "--group", "32", "--sym"];
    let mut args = vec!["report", path_str(&a), path_str(&b), "--json", path_str(&json), "--csv", path_str(&csv)];
    args.extend(recipe);
    let out = bitloupe(&args);
    let stderr = text(&out.stderr);
    assert!(out.status.success(), "{stderr}");
    assert!(stderr.contains("3 tensor(s) quantized, 2 skipped, 0 failed") && stderr.contains("proxy"), "{stderr}");
    assert!(!stderr.contains('\r') && !stderr.contains('\x1b'), "no progress bar when stderr is not a terminal: {stderr:?}");
    assert!(out.stdout.is_empty(), "both outputs went to files");
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert_eq!(doc["schema"], "bitloupe.checkpoint/1");
    assert_eq!(doc["label"], "int3 sym g32 f16");
    let rows = doc["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 5);
    let (mut params, mut bits, mut sum_sq_err, mut sum_sq) = (0u64, 0u64, 0f64, 0f64);
    for (file, (name, _, values)) in tensors_a.iter().map(|t| (&a, t)).chain(tensors_b.iter().map(|t| (&b, t))) {
        let row = rows.iter().find(|r| r["name"] == *name).unwrap();
        assert_eq!(row["file"], path_str(file));
        if *name == "layers.0.norm.weight" {
            assert_eq!(row["status"], "skipped");
            assert!(row["note"].as_str().unwrap().starts_with("1-D"), "{row}");
            continue;
        }
        assert_eq!(row["status"], "quantized", "{row}");
        let single = dir.path().join("single.json");
        let mut args = vec!["quantize", path_str(file), "--tensor", name, "--report", path_str(&single)];
        args.extend(recipe);
        let q = bitloupe(&args);
        assert!(q.status.success(), "{}", text(&q.stderr));
        let one: Value = serde_json::from_str(&std::fs::read_to_string(&single).unwrap()).unwrap();
        for key in ["bits_per_weight", "total_bits", "mse", "sqnr_db", "rel_fro_err", "max_abs_err"] {
            assert_eq!(row[key], one[key], "{name} {key}");
        }
        params += values.len() as u64;
        bits += one["total_bits"].as_u64().unwrap();
        sum_sq_err += one["mse"].as_f64().unwrap() * values.len() as f64;
        sum_sq += values.iter().map(|&x| f64::from(x) * f64::from(x)).sum::<f64>();
    }
    let position = rows.iter().find(|r| r["name"] == "layers.0.position").unwrap();
    assert_eq!((position["status"].as_str(), position["dtype"].as_str()), (Some("skipped"), Some("i8")));
    let totals = &doc["totals"];
    assert_eq!(totals["params"].as_u64(), Some(params));
    assert_eq!(totals["total_bits"].as_u64(), Some(bits));
    assert_eq!(totals["bits_per_weight"].as_f64(), Some(bits as f64 / params as f64));
    let close = |key: &str, want: f64| {
        let got = totals[key].as_f64().unwrap();
        assert!((got - want).abs() <= 1e-9 * want.abs(), "{key}: {got} vs {want}");
    };
    close("mse", sum_sq_err / params as f64);
    close("rel_fro_err", (sum_sq_err / sum_sq).sqrt());
    close("sqnr_db", 10.0 * (sum_sq / sum_sq_err).log10());
    // The norm scale (96 f32) and the position tensor (4 i8) stay as stored.
    assert_eq!((totals["other_params"].as_u64(), totals["other_bits"].as_u64()), (Some(100), Some(96 * 32 + 4 * 8)));

    let table = std::fs::read_to_string(&csv).unwrap();
    let lines: Vec<&str> = table.lines().collect();
    assert_eq!(lines[0], "file,name,shape,dtype,params,status,bits_per_weight,total_bits,mse,sqnr_db,rel_fro_err,max_abs_err,note");
    assert_eq!(lines.len(), 1 + 5 + 1);
    let total: Vec<&str> = lines[6].split(',').collect();
    assert_eq!((total[4], total[5], total[7]), (params.to_string().as_str(), "total", bits.to_string().as_str()));
    assert!(lines.iter().any(|l| l.contains(",layers.1.conv.weight,8x2x48,f32,768,quantized,")), "{table}");
}

/// Same figures on one thread as on every core (rows are merged in a fixed order: rows.rs), and
/// the default output is the CSV on standard output.
#[test]
fn report_is_the_same_on_one_thread_and_prints_csv_by_default() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("m.safetensors");
    write_checkpoint(&file, &[("w", vec![200, 160], normal_values(200 * 160, 5, 0.1))], &[]);
    let run = |threads: &str| bitloupe(&["report", path_str(&file), "--threads", threads, "--method", "hqq"]);
    let (one, all) = (run("1"), run("0"));
    assert!(one.status.success(), "{}", text(&one.stderr));
    assert!(text(&one.stdout).starts_with("file,name,shape"), "{}", text(&one.stdout));
    assert_eq!(text(&one.stdout), text(&all.stdout));
}

/// The pattern and --include-1d pick tensors of the multi-type fixture; a tensor that fails is a
/// row with its message, the report is still written and the exit status is 3 (report --help).
#[test]
fn report_selection_and_a_failing_tensor() {
    let dir = tempfile::tempdir().unwrap();
    let multi = fixture("multi.safetensors");
    let out = bitloupe(&["report", path_str(&multi), "--pattern", "block.*.weight", "--json", "-"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let doc: Value = serde_json::from_str(&text(&out.stdout)).unwrap();
    let status = |doc: &Value, name: &str| doc["rows"].as_array().unwrap().iter().find(|r| r["name"] == name).unwrap()["status"].clone();
    assert_eq!(status(&doc, "block.0.attn.q.weight"), "quantized");
    assert_eq!(status(&doc, "block.10.norm.scale"), "skipped");
    assert_eq!(doc["totals"]["quantized_tensors"], 3);
    let out = bitloupe(&["report", path_str(&multi), "--pattern", "*.norm.*", "--include-1d", "--json", "-"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let doc: Value = serde_json::from_str(&text(&out.stdout)).unwrap();
    assert_eq!(status(&doc, "block.10.norm.scale"), "quantized");
    assert_eq!(doc["totals"]["params"], 6);

    let file = dir.path().join("nan.safetensors");
    let mut bad = normal_values(64, 6, 1.0);
    bad[10] = f32::NAN;
    write_checkpoint(&file, &[("bad", vec![2, 32], bad), ("good", vec![2, 32], normal_values(64, 7, 1.0))], &[]);
    let json = dir.path().join("r.json");
    let out = bitloupe(&["report", path_str(&file), "--json", path_str(&json)]);
    assert_eq!(out.status.code(), Some(3), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("failed bad in"), "{}", text(&out.stderr));
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
    assert_eq!(status(&doc, "bad"), "failed");
    assert!(doc["rows"][0]["note"].as_str().unwrap().contains("1 NaN"), "{}", doc["rows"][0]);
    assert_eq!((doc["totals"]["failed_tensors"].as_u64(), doc["totals"]["params"].as_u64()), (Some(1), Some(64)));
}

/// Inputs that stop a report: exit status 1, one line, and no output file (not even the one
/// that could have been written).
#[test]
fn report_failures_write_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let good = dir.path().join("good.safetensors");
    write_checkpoint(&good, &[("w", vec![4, 32], normal_values(128, 8, 1.0))], &[]);
    let bad = dir.path().join("bad.safetensors");
    std::fs::write(&bad, b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all").unwrap();
    let json = dir.path().join("r.json");
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec![path_str(&good), path_str(&bad)], "bad.safetensors: not a valid"),
        (vec![path_str(&good), "/no/such/file.safetensors"], "cannot open"),
        (vec![path_str(&good), "--pattern", "*.bias"], "no tensor is selected by '*.bias'"),
        (vec![path_str(&good), "--method", "gptq"], "GPTQ needs calibration"),
        (vec![path_str(&good), "--bits", "9"], "9 bits"),
        (vec![path_str(&good), "--csv", "/no/such/dir/r.csv"], "cannot write"),
        (vec![path_str(&good), "--csv", "-", "--json", "-"], "only one of --json and --csv"),
    ];
    for (mut args, needle) in cases {
        args.insert(0, "report");
        if !args.contains(&"--json") {
            args.extend(["--json", path_str(&json)]);
        }
        let out = bitloupe(&args);
        let stderr = text(&out.stderr);
        assert_eq!(out.status.code(), Some(1), "{args:?}: {stderr}");
        assert_eq!(stderr.lines().count(), 1, "{args:?}: {stderr}");
        assert!(stderr.contains(needle), "{args:?}: expected '{needle}' in: {stderr}");
        assert!(!json.exists(), "{args:?} left an output behind");
        let leftovers = std::fs::read_dir(dir.path()).unwrap().filter_map(|e| e.ok()).filter(|e| e.file_name().to_string_lossy().contains("partial")).count();
        assert_eq!(leftovers, 0, "{args:?} left a partial file");
    }
}

/// An output that is a device is written in place: replacing it by a rename, as regular outputs
/// are, would turn /dev/null into a file (common practice: write-then-rename suits regular files
/// only).
#[cfg(unix)]
#[test]
fn outputs_to_dev_null_leave_the_device_in_place() {
    use std::os::unix::fs::FileTypeExt;
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("r.csv");
    let out = bitloupe(&["report", path_str(&fixture("multi.safetensors")), "--json", "/dev/null", "--csv", path_str(&csv)]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(std::fs::metadata("/dev/null").unwrap().file_type().is_char_device(), "/dev/null was replaced");
    assert!(std::fs::read_to_string(&csv).unwrap().starts_with("file,name,shape"));
}

/// Every command's help fits a terminal of 100 columns, its default width where none is known
/// (common practice for command-line help): one long value list once made clap set every
/// description one word per line.
#[test]
fn help_fits_a_hundred_columns() {
    for command in [&["--help"][..], &["inspect", "--help"], &["quantize", "--help"], &["unpack", "--help"], &["sweep", "--help"], &["report", "--help"], &["demo", "--help"]] {
        let out = Command::new(env!("CARGO_BIN_EXE_bitloupe")).args(command).env_remove("COLUMNS").output().unwrap();
        assert!(out.status.success(), "{command:?}");
        let help = text(&out.stdout);
        let widest = help.lines().map(|l| l.chars().count()).max().unwrap_or(0);
        assert!(widest <= 100, "{command:?}: a line of {widest} columns");
        assert!(help.lines().count() < 80, "{command:?}: {} lines", help.lines().count());
    }
}
