//! One case of the speed table (`bench/compare.py`, run by `cargo xtask bench`): open a tensor
//! file, then run the default recipe (int4, asymmetric, groups of 128, f16 scales) with every
//! statistic, several times. Prints one JSON line: the open time, the median analysis time,
//! the time of a plain copy of the tensor (the memory-traffic floor), and the peak resident
//! memory of opening the file and analysing it once, above what the process held before.
//!
//! Usage: bench_case FILE [REPEATS] [THREADS]   (THREADS 1 = single-threaded, 0 = all cores)

// The command's allocator (see crate/src/main.rs).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

use bitloupe::tensor::{self, ReadOptions};
use bitloupe::{analyze, Recipe};
use std::time::Instant;

fn main() -> Result<(), Box<dyn std::error::Error + Send + Sync>> {
    let args: Vec<String> = std::env::args().collect();
    let path = args.get(1).ok_or("usage: bench_case FILE [REPEATS] [THREADS]")?;
    let repeats: usize = args.get(2).map_or(Ok(5), |s| s.parse())?;
    let threads: usize = args.get(3).map_or(Ok(1), |s| s.parse())?;
    let baseline = resident_bytes("VmRSS:").unwrap_or(0);
    let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build()?;
    pool.install(|| -> Result<(), Box<dyn std::error::Error + Send + Sync>> {
        let file = std::fs::File::open(path)?;
        let start = Instant::now();
        let listing = tensor::list(&file, ReadOptions::default())?;
        let tensor = tensor::read(&file, listing.choose(None)?)?;
        let open_ms = start.elapsed().as_secs_f64() * 1e3;
        let recipe = Recipe::default();
        let mut times = Vec::with_capacity(repeats);
        let mut peak = None;
        for _ in 0..repeats.max(1) {
            let start = Instant::now();
            std::hint::black_box(analyze(&tensor, &recipe)?);
            times.push(start.elapsed().as_secs_f64() * 1e3);
            // The peak of one analysis: later repeats may find the allocator still holding the
            // previous run's freed pages, which says nothing about what one analysis needs.
            peak = peak.or_else(|| resident_bytes("VmHWM:"));
        }
        times.sort_by(f64::total_cmp);
        let median_ms = times[times.len() / 2];
        // The floor set by memory traffic: the same bytes read and written by a plain copy into
        // fresh memory (the analysis reads each weight once and writes its reconstruction once).
        let mut copies = Vec::with_capacity(repeats);
        for _ in 0..repeats.max(1) {
            let start = Instant::now();
            std::hint::black_box(tensor.values.as_slice().expect("row-major").to_vec());
            copies.push(start.elapsed().as_secs_f64() * 1e3);
        }
        copies.sort_by(f64::total_cmp);
        let copy_ms = copies[copies.len() / 2];
        println!(
            "{{\"open_ms\": {open_ms:.3}, \"analyze_ms\": {median_ms:.3}, \"copy_ms\": {copy_ms:.3}, \"peak_bytes\": {}, \"elements\": {}}}",
            peak.map_or(0, |peak| peak.saturating_sub(baseline)),
            tensor.values.len()
        );
        Ok(())
    })
}

/// A line of the process's memory status (VmRSS: now, VmHWM: peak), where the system reports it.
fn resident_bytes(field: &str) -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with(field))?;
    let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}
