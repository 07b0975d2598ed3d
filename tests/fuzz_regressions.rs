//! Every input that ever crashed or hung a fuzz target (`fuzz/regressions/<target>/`), and the
//! fuzzers' seed files (`fuzz/seeds/<target>/`), replayed through the same target bodies the
//! fuzzers run (`fuzz/entries.rs`): each must end in a result or a one-line error, never a panic.
//! The fuzzers themselves run with `cargo +nightly fuzz run <target>` (see fuzz/README.md).

#[path = "../fuzz/entries.rs"]
mod entries;

use std::path::PathBuf;

/// Feed every saved input of `target` to `body`; fails on the first panic, naming the file.
fn replay(target: &str, body: fn(&[u8])) {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../fuzz");
    let mut replayed = 0;
    for kind in ["seeds", "regressions"] {
        let Ok(dir) = std::fs::read_dir(root.join(kind).join(target)) else { continue };
        let mut files: Vec<PathBuf> = dir.filter_map(|e| e.ok()).map(|e| e.path()).filter(|p| p.is_file()).collect();
        files.sort();
        for file in files {
            let bytes = std::fs::read(&file).unwrap();
            if std::panic::catch_unwind(|| body(&bytes)).is_err() {
                panic!("{} fails its fuzz target '{target}'", file.display());
            }
            replayed += 1;
        }
    }
    assert!(replayed > 0, "no saved inputs for the fuzz target '{target}'");
}

#[test]
fn npy_inputs_replay_cleanly() {
    replay("npy", entries::npy);
}

#[test]
fn safetensors_inputs_replay_cleanly() {
    replay("safetensors", entries::safetensors);
}

#[test]
fn text_inputs_replay_cleanly() {
    replay("text", entries::text);
}

#[test]
fn calib_inputs_replay_cleanly() {
    replay("calib", entries::calib);
}

#[test]
fn unpack_inputs_replay_cleanly() {
    replay("unpack", entries::unpack);
}

#[test]
fn recipe_inputs_replay_cleanly() {
    replay("recipe", entries::recipe);
}
