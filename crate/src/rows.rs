//! Row blocks: how row-independent work is split, so that a result never depends on how many
//! threads (or web workers) computed it.
//!
//! Every such computation runs over blocks of [`ROW_BLOCK`] consecutive rows, counted from row
//! 0, and the blocks' partial results are combined strictly in row order. Floating-point sums
//! are therefore added in the same order whether one thread walks the blocks in turn or many take
//! them at once, and the figures are identical bit for bit. The blocks are spread over rayon's
//! threads: native threads, or, in the page's threaded WebAssembly build, a pool of web workers
//! sharing one memory. The single-threaded WebAssembly build runs them in turn.

use std::ops::Range;

/// Rows per block. Also the number of rows whose per-column sums are taken in f32 before they go
/// into the f64 totals (`metrics`), so a block is the natural unit of partial sums.
pub const ROW_BLOCK: usize = 64;

/// The rows of block `index` of a tensor with `rows` rows.
pub fn block_rows(index: usize, rows: usize) -> Range<usize> {
    let start = (index * ROW_BLOCK).min(rows);
    start..(start + ROW_BLOCK).min(rows)
}

/// Number of blocks covering `rows` rows.
pub fn block_count(rows: usize) -> usize {
    rows.div_ceil(ROW_BLOCK)
}

/// Progress reports per run at most: each ends a wave of blocks, and every wave wakes the pool's
/// threads again, which costs far more in a browser's web workers than natively.
const WAVES: usize = 8;

/// Blocks handed out at once, out of `blocks`: a whole number per thread and at most [`WAVES`]
/// waves, so that progress can be reported between waves from the calling thread (a progress
/// callback need not be shareable across threads).
fn blocks_per_wave(blocks: usize) -> usize {
    let threads = threads();
    blocks.div_ceil(WAVES).div_ceil(threads).max(1) * threads
}

/// Threads that take blocks.
fn threads() -> usize {
    #[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
    {
        rayon::current_num_threads().max(1)
    }
    #[cfg(all(target_arch = "wasm32", not(target_feature = "atomics")))]
    {
        1
    }
}

/// Apply `work(first_row, rows_of_out)` to every block of a row-major `[rows, cols]` buffer,
/// returning the blocks' results in row order and calling `progress(rows done, rows)` between
/// waves of blocks.
pub fn map_blocks_mut<T: Send, R: Send>(
    out: &mut [T],
    cols: usize,
    progress: &mut dyn FnMut(usize, usize),
    work: impl Fn(usize, &mut [T]) -> R + Sync + Send,
) -> Vec<R> {
    map_chunks_mut(out, cols, ROW_BLOCK, progress, work)
}

/// [`map_blocks_mut`] over chunks of `chunk_rows` rows (a fixed constant of the caller, so that
/// the split never depends on the thread count).
pub fn map_chunks_mut<T: Send, R: Send>(
    out: &mut [T],
    cols: usize,
    chunk_rows: usize,
    progress: &mut dyn FnMut(usize, usize),
    work: impl Fn(usize, &mut [T]) -> R + Sync + Send,
) -> Vec<R> {
    if out.is_empty() || cols == 0 {
        return Vec::new();
    }
    let rows = out.len() / cols;
    let chunk = chunk_rows * cols;
    let per_wave = blocks_per_wave(rows.div_ceil(chunk_rows));
    let mut results = Vec::with_capacity(rows.div_ceil(chunk_rows));
    for (w, wave_rows) in out.chunks_mut(chunk * per_wave).enumerate() {
        let first = w * per_wave * chunk_rows;
        let done = first + wave_rows.len() / cols;
        #[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
        {
            use rayon::prelude::*;
            let wave_results: Vec<R> =
                wave_rows.par_chunks_mut(chunk).enumerate().map(|(i, block)| work(first + i * chunk_rows, block)).collect();
            results.extend(wave_results);
        }
        #[cfg(all(target_arch = "wasm32", not(target_feature = "atomics")))]
        results.extend(wave_rows.chunks_mut(chunk).enumerate().map(|(i, block)| work(first + i * chunk_rows, block)));
        progress(done, rows);
    }
    results
}

/// Apply `work(rows)` to every block of `rows` rows, returning the results in row order.
pub fn map_blocks<R: Send>(rows: usize, work: impl Fn(Range<usize>) -> R + Sync + Send) -> Vec<R> {
    map_items(block_count(rows), |i| work(block_rows(i, rows)))
}

/// Apply `work(i)` to every i in 0..count (independent items such as sweep recipes or search
/// candidates), returning the results in order.
pub fn map_items<R: Send>(count: usize, work: impl Fn(usize) -> R + Sync + Send) -> Vec<R> {
    #[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
    {
        use rayon::prelude::*;
        (0..count).into_par_iter().map(work).collect()
    }
    #[cfg(all(target_arch = "wasm32", not(target_feature = "atomics")))]
    {
        (0..count).map(work).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn blocks_cover_every_row_once_in_order() {
        for rows in [0usize, 1, 63, 64, 65, 200] {
            let covered: Vec<usize> = (0..block_count(rows)).flat_map(|i| block_rows(i, rows)).collect();
            assert_eq!(covered, (0..rows).collect::<Vec<_>>());
            let firsts = map_blocks(rows, |r| r.start);
            assert_eq!(firsts, (0..block_count(rows)).map(|i| i * ROW_BLOCK).collect::<Vec<_>>());
        }
        let mut out = vec![0f32; 130 * 3];
        let mut reported = Vec::new();
        let seen = map_blocks_mut(&mut out, 3, &mut |done, all| reported.push((done, all)), |first, block| {
            block.fill(first as f32);
            block.len() / 3
        });
        assert_eq!(seen, vec![64, 64, 2]);
        assert_eq!(reported.last(), Some(&(130, 130)));
        assert!(reported.windows(2).all(|w| w[0].0 < w[1].0));
        assert_eq!((out[0], out[64 * 3], out[129 * 3 + 2]), (0.0, 64.0, 128.0));
    }
}
