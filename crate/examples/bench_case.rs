//! One case of the speed table (`bench/compare.py`, run by `cargo xtask bench`): open a tensor
//! file, then run the default recipe (int4, asymmetric, groups of 128, f16 scales) with every
//! statistic, several times. Prints one JSON line: the open time, the median analysis time,
//! the time of a plain copy of the tensor (the memory-traffic floor), and the peak memory of
//! opening the file and analysing it once, above what the process held before: the most heap
//! bytes live at any one time (counted below), and the peak resident set the system reports
//! (which also holds the program's own code as it is paged in, and whole 2 MiB pages where the
//! kernel backs memory with huge pages).
//!
//! With PAUSE_MS, each analysis follows that long an idle pause, as a user's recipe changes do in
//! the page (`bench/page.mjs` sets the pool there beside this): by then the pool's threads sleep,
//! and on some machines a sleeping thread starts late once woken (DEVELOPERS.md, "Where the time
//! goes"), which a short run shows.
//!
//! With BENCH_START_AT (milliseconds since the Unix epoch) in the environment, the analyses start
//! at that moment, after the file is open: two copies started together then analyse side by side
//! from their first run, whatever their open times (`bench/page.mjs` measures that way what the
//! machine's two cores give to two single-threaded runs at once).
//!
//! Usage: bench_case FILE [REPEATS] [THREADS] [PAUSE_MS]   (THREADS 1 = single-threaded, 0 = all cores)

#[path = "../../tests/shared/counting_alloc.rs"]
mod counting_alloc;

/// The command's allocator (see crate/src/main.rs), counted.
#[global_allocator]
static ALLOCATOR: counting_alloc::Counting<mimalloc::MiMalloc> = counting_alloc::Counting(mimalloc::MiMalloc);

use bitloupe::tensor::{self, ReadOptions};
use bitloupe::{analyze, Recipe};
use std::time::Instant;

fn main() -> Result<(), Box<dyn std::error::Error + Send + Sync>> {
    let args: Vec<String> = std::env::args().collect();
    let path = args.get(1).ok_or("usage: bench_case FILE [REPEATS] [THREADS] [PAUSE_MS]")?;
    let repeats: usize = args.get(2).map_or(Ok(5), |s| s.parse())?;
    let threads: usize = args.get(3).map_or(Ok(1), |s| s.parse())?;
    let pause = std::time::Duration::from_millis(args.get(4).map_or(Ok(0), |s| s.parse())?);
    // The analysis is called from outside the pool, as the command and the page's compute worker
    // call it: this thread waits while the pool's threads compute.
    rayon::ThreadPoolBuilder::new().num_threads(threads).build_global()?;
    let baseline = resident_bytes("VmRSS:").unwrap_or(0);
    let heap_baseline = counting_alloc::restart_peak();
    let file = std::fs::File::open(path)?;
    let start = Instant::now();
    let listing = tensor::list(&file, ReadOptions::default())?;
    let tensor = tensor::read(&file, listing.choose(None)?)?;
    let open_ms = start.elapsed().as_secs_f64() * 1e3;
    if let Ok(at) = std::env::var("BENCH_START_AT") {
        let at = std::time::UNIX_EPOCH + std::time::Duration::from_millis(at.parse()?);
        if let Ok(wait) = at.duration_since(std::time::SystemTime::now()) {
            std::thread::sleep(wait);
        }
    }
    let recipe = Recipe::default();
    let mut times = Vec::with_capacity(repeats);
    let (mut peak, mut heap_peak) = (None, None);
    for _ in 0..repeats.max(1) {
        std::thread::sleep(pause);
        let start = Instant::now();
        std::hint::black_box(analyze(&tensor, &recipe)?);
        times.push(start.elapsed().as_secs_f64() * 1e3);
        // The peak of one analysis: later repeats may find the allocator still holding the
        // previous run's freed pages, which says nothing about what one analysis needs.
        peak = peak.or_else(|| resident_bytes("VmHWM:"));
        heap_peak = heap_peak.or_else(|| Some(counting_alloc::peak() - heap_baseline));
    }
    times.sort_by(f64::total_cmp);
    let median_ms = times[times.len() / 2];
    // The floor set by memory traffic: the same bytes read and written by a plain copy into
    // fresh memory (the analysis reads each weight once and writes a row of scratch per row;
    // until the thirteenth session it wrote its reconstruction once, the copy's write).
    let mut copies = Vec::with_capacity(repeats);
    for _ in 0..repeats.max(1) {
        let start = Instant::now();
        std::hint::black_box(tensor.values.as_slice().expect("row-major").to_vec());
        copies.push(start.elapsed().as_secs_f64() * 1e3);
    }
    copies.sort_by(f64::total_cmp);
    let copy_ms = copies[copies.len() / 2];
    println!(
        "{{\"open_ms\": {open_ms:.3}, \"analyze_ms\": {median_ms:.3}, \"copy_ms\": {copy_ms:.3}, \"peak_bytes\": {}, \"heap_peak_bytes\": {}, \"elements\": {}}}",
        peak.map_or(0, |peak| peak.saturating_sub(baseline)),
        heap_peak.unwrap_or(0),
        tensor.values.len()
    );
    Ok(())
}

/// A line of the process's memory status (VmRSS: now, VmHWM: peak), where the system reports it.
fn resident_bytes(field: &str) -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with(field))?;
    let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}
