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
use std::sync::{Mutex, MutexGuard, PoisonError};

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

/// Threads the row blocks are spread over: rayon's pool, or one in the single-threaded
/// WebAssembly build.
pub fn threads() -> usize {
    #[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
    return rayon::current_num_threads();
    #[cfg(all(target_arch = "wasm32", not(target_feature = "atomics")))]
    return 1;
}

/// How often the calling thread reports progress while the pool works.
#[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
const PROGRESS_EVERY: std::time::Duration = std::time::Duration::from_millis(40);

/// Apply `work(first_row, rows_of_out)` to every block of a row-major `[rows, cols]` buffer and
/// fold each block's result into `total` with `fold`, strictly in row order, calling
/// `progress(rows done, rows)` now and then from the calling thread.
///
/// A result is folded as soon as every block before it has been, by the thread that finished the
/// block completing that sequence, while the other threads go on computing: the combining
/// overlaps the blocks rather than following them all on one thread (a 4096 × 4096 analysis in
/// the page had 1.5–2.7 ms of it left after the last block, 0.3–0.5 ms since). The order of the
/// folds, and so every sum they take, is the same whatever the number of threads.
pub fn fold_blocks_mut<T: Send, R: Send, A: Send>(
    out: &mut [T],
    cols: usize,
    progress: &mut dyn FnMut(usize, usize),
    total: A,
    work: impl Fn(usize, &mut [T]) -> R + Sync + Send,
    fold: impl Fn(&mut A, R) + Sync + Send,
) -> A {
    use std::sync::atomic::{fence, Ordering::SeqCst};
    let blocks = block_count(out.len().checked_div(cols).unwrap_or(0));
    // Each block's result waits in its slot for its turn; `folded` holds the next block to fold
    // and the total so far.
    let slots: Vec<Mutex<Option<R>>> = (0..blocks).map(|_| Mutex::new(None)).collect();
    let folded = Mutex::new((0, total));
    map_chunks_mut(out, cols, ROW_BLOCK, progress, |first, block| {
        let result = work(first, block);
        *lock(&slots[first / ROW_BLOCK]) = Some(result);
        // Fold every result whose turn has come, unless another thread is folding: a thread never
        // waits for another's fold, which then also takes this result.
        loop {
            // With the fence after the unlock below, either this attempt finds the lock free or
            // the thread that held it sees this result in its slot.
            fence(SeqCst);
            let Ok(mut guard) = folded.try_lock() else { return };
            let (next, total) = &mut *guard;
            while let Some(ready) = slots.get(*next).and_then(|slot| lock(slot).take()) {
                fold(total, ready);
                *next += 1;
            }
            let next = *next;
            drop(guard);
            fence(SeqCst);
            // A result left while this thread held the lock, after it looked, is folded now.
            if !slots.get(next).is_some_and(|slot| lock(slot).is_some()) {
                return;
            }
        }
    });
    folded.into_inner().unwrap_or_else(PoisonError::into_inner).1
}

/// A lock whose holder may have panicked: the panic re-raises from the pool, so a poisoned lock's
/// state no longer matters.
fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(PoisonError::into_inner)
}

/// [`fold_blocks_mut`] over the blocks of `rows` rows with nothing to write: `work(rows)`.
pub fn fold_blocks<R: Send, A: Send>(
    rows: usize,
    progress: &mut dyn FnMut(usize, usize),
    total: A,
    work: impl Fn(Range<usize>) -> R + Sync + Send,
    fold: impl Fn(&mut A, R) + Sync + Send,
) -> A {
    // A slice of units gives the blocks and progress (a vector of a zero-sized type allocates
    // nothing).
    let mut units = vec![(); rows];
    fold_blocks_mut(&mut units, 1, progress, total, |first, block| work(first..first + block.len()), fold)
}

/// Apply `work(first_row, rows_of_out)` to every chunk of `chunk_rows` rows (a fixed constant of
/// the caller, so that the split never depends on the thread count) of a row-major
/// `[rows, cols]` buffer, returning the chunks' results in row order and calling
/// `progress(rows done, rows)` now and then, from the calling thread.
pub fn map_chunks_mut<T: Send, R: Send>(
    out: &mut [T],
    cols: usize,
    chunk_rows: usize,
    progress: &mut dyn FnMut(usize, usize),
    work: impl Fn(usize, &mut [T]) -> R + Sync + Send,
) -> Vec<R> {
    map_chunks_mut_advancing(out, cols, chunk_rows, progress, |first, chunk, _| work(first, chunk))
}

/// [`map_chunks_mut`] for work whose chunks take long (GPTQ's 256 rows, seconds on a wide layer):
/// `work(first_row, rows_of_out, advance)` may call `advance(rows)` as parts of its chunk get
/// done, so that progress moves within a chunk; what a chunk has not reported when it ends is
/// added then, and what it over-reports is ignored.
pub fn map_chunks_mut_advancing<T: Send, R: Send>(
    out: &mut [T],
    cols: usize,
    chunk_rows: usize,
    progress: &mut dyn FnMut(usize, usize),
    work: impl Fn(usize, &mut [T], &dyn Fn(usize)) -> R + Sync + Send,
) -> Vec<R> {
    if out.is_empty() || cols == 0 {
        return Vec::new();
    }
    let rows = out.len() / cols;
    let chunk = chunk_rows * cols;
    #[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
    {
        use std::sync::atomic::{AtomicUsize, Ordering};
        let rows_done = AtomicUsize::new(0);
        let blocks: Vec<Mutex<Option<&mut [T]>>> = out.chunks_mut(chunk).map(|block| Mutex::new(Some(block))).collect();
        let all = || {
            claim_in_order(blocks.len(), |i| {
                let block = lock(&blocks[i]).take().expect("each block is claimed once");
                let block_rows = block.len() / cols;
                let advanced = std::cell::Cell::new(0);
                let advance = |n: usize| {
                    let n = n.min(block_rows - advanced.get());
                    advanced.set(advanced.get() + n);
                    rows_done.fetch_add(n, Ordering::Relaxed);
                };
                let result = work(i * chunk_rows, block, &advance);
                rows_done.fetch_add(block_rows - advanced.get(), Ordering::Relaxed);
                result
            })
        };
        if rayon::current_thread_index().is_some() {
            // Already on a pool thread (one item of a sweep or a checkpoint report): waiting here
            // would hold a thread the blocks may need.
            let results = all();
            progress(rows, rows);
            return results;
        }
        // The blocks go to the pool as one job while this thread, which owns the progress
        // callback, reports how far they got; no block ever waits for a report.
        wake_pool();
        let finished = Finished::default();
        rayon::in_place_scope(|scope| {
            scope.spawn(|_| {
                let _ended = finished.on_drop();
                *finished.results.lock().expect("not poisoned") = Some(all());
            });
            let mut reported = 0;
            while !finished.wait(PROGRESS_EVERY) {
                let done = rows_done.load(Ordering::Relaxed);
                if done > reported {
                    progress(done, rows);
                    reported = done;
                }
            }
        });
        // A block that panicked was re-raised by the scope above, so the results are here.
        let results = finished.results.into_inner().expect("not poisoned").expect("the job finished");
        progress(rows, rows);
        results
    }
    #[cfg(all(target_arch = "wasm32", not(target_feature = "atomics")))]
    {
        let mut results = Vec::with_capacity(rows.div_ceil(chunk_rows));
        let progress = std::cell::RefCell::new(progress);
        for (i, block) in out.chunks_mut(chunk).enumerate() {
            let (first, block_rows) = (i * chunk_rows, block.len() / cols);
            let advanced = std::cell::Cell::new(0);
            let advance = |n: usize| {
                advanced.set((advanced.get() + n).min(block_rows));
                (progress.borrow_mut())(first + advanced.get(), rows);
            };
            results.push(work(first, block, &advance));
            (progress.borrow_mut())(first + block_rows, rows);
        }
        results
    }
}

/// Apply `work(i)` to every i in 0..count on every thread of the pool, each thread taking the
/// lowest index no thread has taken yet, and return the results by index.
///
/// The items are finished close to their order, so row blocks are folded as they come and the
/// threads end within one item of each other. Split by rayon's halving instead, the second
/// thread took the upper half of the blocks, whose results then waited for the lower half and
/// were folded one after another after the last block (0.3–0.5 ms of a 4096 × 4096 analysis in
/// the page, with one thread idle).
#[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
fn claim_in_order<R: Send>(count: usize, work: impl Fn(usize) -> R + Sync) -> Vec<R> {
    use std::sync::atomic::{AtomicUsize, Ordering};
    let next = AtomicUsize::new(0);
    let results: Vec<Mutex<Option<R>>> = (0..count).map(|_| Mutex::new(None)).collect();
    let claim = || loop {
        let i = next.fetch_add(1, Ordering::Relaxed);
        let Some(slot) = results.get(i) else { return };
        let result = work(i);
        *lock(slot) = Some(result);
    };
    // Run on a pool thread (rayon moves the scope there when called from outside), which claims
    // items too; the other threads join as they pick up their share of the scope.
    rayon::scope(|scope| {
        for _ in 1..rayon::current_num_threads().min(count) {
            scope.spawn(|_| claim());
        }
        claim();
    });
    // A panic in `work` was re-raised by the scope above, so every index has its result.
    results.into_iter().map(|slot| slot.into_inner().unwrap_or_else(PoisonError::into_inner).expect("every index was claimed")).collect()
}

/// From a thread outside the pool, wake every pool thread before handing it a job. A pool thread
/// that has gone to sleep is otherwise woken by the first thread to split the job, and on some
/// machines a thread woken by a busy pool thread starts milliseconds later than one woken from
/// outside: natively on a two-core virtual machine, after an idle pause, 3.7 ms against 0.05 ms,
/// a third of the second thread's share of a 4096 × 4096 analysis. Inside the pool (one item of a
/// sweep or a checkpoint report) this does nothing: the threads are awake.
#[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
fn wake_pool() {
    if rayon::current_thread_index().is_none() {
        rayon::spawn_broadcast(|_| {});
    }
}

/// The end of a job handed to the pool, and its results.
#[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
struct Finished<R> {
    results: std::sync::Mutex<Option<R>>,
    ended: std::sync::Mutex<bool>,
    signal: std::sync::Condvar,
}

#[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
impl<R> Default for Finished<R> {
    fn default() -> Self {
        Finished { results: std::sync::Mutex::new(None), ended: std::sync::Mutex::new(false), signal: std::sync::Condvar::new() }
    }
}

#[cfg(any(not(target_arch = "wasm32"), target_feature = "atomics"))]
impl<R> Finished<R> {
    /// Marks the job ended when dropped, also when the job panics, so the waiter never hangs.
    fn on_drop(&self) -> impl Drop + '_ {
        struct Ends<'a>(&'a std::sync::Mutex<bool>, &'a std::sync::Condvar);
        impl Drop for Ends<'_> {
            fn drop(&mut self) {
                *self.0.lock().unwrap_or_else(|e| e.into_inner()) = true;
                self.1.notify_all();
            }
        }
        Ends(&self.ended, &self.signal)
    }

    /// Whether the job has ended, after waiting at most `timeout` for it.
    fn wait(&self, timeout: std::time::Duration) -> bool {
        let ended = self.ended.lock().unwrap_or_else(|e| e.into_inner());
        if *ended {
            return true;
        }
        *self.signal.wait_timeout(ended, timeout).unwrap_or_else(|e| e.into_inner()).0
    }
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
        wake_pool();
        claim_in_order(count, work)
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
        let seen = fold_blocks_mut(&mut out, 3, &mut |done, all| reported.push((done, all)), Vec::new(), |first, block| {
            block.fill(first as f32);
            block.len() / 3
        }, |all, rows| all.push(rows));
        assert_eq!(seen, vec![64, 64, 2]);
        assert_eq!(reported.last(), Some(&(130, 130)));
        assert!(reported.windows(2).all(|w| w[0].0 < w[1].0));
        assert_eq!((out[0], out[64 * 3], out[129 * 3 + 2]), (0.0, 64.0, 128.0));
        for rows in [0usize, 1, 64, 130] {
            let mut reported = Vec::new();
            let ranges = fold_blocks(rows, &mut |done, all| reported.push((done, all)), Vec::new(), |r| r, |all, r| all.push(r));
            assert_eq!(ranges, (0..block_count(rows)).map(|i| block_rows(i, rows)).collect::<Vec<_>>());
            assert_eq!(reported.last().copied(), (rows > 0).then_some((rows, rows)));
        }
    }

    /// Blocks that finish out of order (here the later ones sooner, on a pool of three threads)
    /// are still folded in row order, each once.
    #[test]
    fn folds_come_in_row_order_whatever_order_blocks_finish_in() {
        let pool = rayon::ThreadPoolBuilder::new().num_threads(3).build().unwrap();
        let rows = 20 * ROW_BLOCK + 5;
        let order = pool.install(|| {
            fold_blocks(rows, &mut |_, _| {}, Vec::new(), |r| {
                std::thread::sleep(std::time::Duration::from_micros(200 * (rows - r.start) as u64 / ROW_BLOCK as u64));
                r.start / ROW_BLOCK
            }, |all: &mut Vec<usize>, i| all.push(i))
        });
        assert_eq!(order, (0..block_count(rows)).collect::<Vec<_>>());
    }

    /// A long chunk's own reports move the progress within it; a report past its rows is cut to
    /// them, and what it left unreported is added when it ends.
    #[test]
    fn a_long_chunk_reports_progress_within_itself() {
        let mut out = vec![0u8; 10];
        let mut reported = Vec::new();
        map_chunks_mut_advancing(&mut out, 1, 10, &mut |done, all| reported.push((done, all)), |_, _, advance| {
            advance(4);
            std::thread::sleep(PROGRESS_EVERY * 3);
            advance(100);
            std::thread::sleep(PROGRESS_EVERY * 3);
        });
        assert!(reported.contains(&(4, 10)), "{reported:?}");
        assert_eq!(reported.last(), Some(&(10, 10)));
        assert!(reported.iter().all(|&(done, _)| done <= 10), "{reported:?}");
    }

    /// A block that panics reaches the caller as that panic; the caller does not wait forever
    /// for a job that ended without its results.
    #[test]
    fn a_panicking_block_reaches_the_caller() {
        let mut out = vec![0f32; 300 * 2];
        let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            fold_blocks_mut(&mut out, 2, &mut |_, _| {}, (), |first, _| assert!(first != 128, "block at row 128"), |_, _| {})
        }));
        let message = outcome.expect_err("the panic is re-raised");
        let text = message.downcast_ref::<&str>().copied().or_else(|| message.downcast_ref::<String>().map(String::as_str));
        assert_eq!(text, Some("block at row 128"));
    }
}
