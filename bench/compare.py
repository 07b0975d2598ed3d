"""The speed table of the README (run by `cargo xtask bench`; not a test).

For each case — a seeded Gaussian weight (numpy's default_rng(42), σ = 0.02) of 2048 × 2048,
4096 × 4096 or 4096 × 14336, stored as f32 or f16 `.npy` — it times the default recipe (int4,
asymmetric, groups of 128, f16 scales) with every statistic (per tensor, per group, per input
column) three ways on the same file:

* native: the `bench_case` example, single-threaded and on all cores;
* wasm: `bench/wasm_case.mjs` under Node, the release wasm build (single-threaded);
* numpy: the plain vectorised implementation below, single-threaded (numpy's element-wise
  operations use one core; BLAS is not involved, and its thread count is pinned to 1 anyway).

Each time is the median of several runs of the analysis alone (the file is opened once, before).
"plain copy" is the time to copy the tensor into fresh memory on one thread: the same bytes read
and written as the analysis, so the floor memory traffic sets. Peak memory, divided by the
tensor's f32 size, is taken over opening the file and one analysis: natively the most heap bytes
live at once ("heap") and the process's peak resident set above its size before ("resident",
which adds the program's code as it pages in and the kernel's huge-page rounding); in wasm the
instance's memory size (the runner reads the file in ranges, as the page does). Prints one
markdown table.

Environment: BENCH_CASE (path of the native example), WASM_PKG (folder of the Node build).
"""

import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from datetime import date

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")
import numpy as np  # noqa: E402

SHAPES = [(2048, 2048), (4096, 4096), (4096, 14336)]
DTYPES = ["f32", "f16"]
GROUP, BITS = 128, 4


def numpy_rtn(w):
    """Round to nearest, 4-bit asymmetric, groups of 128, f16 scales, with every statistic."""
    rows, cols = w.shape
    g = w.reshape(rows, cols // GROUP, GROUP)
    lo = np.minimum(g.min(axis=-1), 0)
    hi = np.maximum(g.max(axis=-1), 0)
    qmax = 2**BITS - 1
    scale = ((hi - lo) / qmax).astype(np.float16).astype(np.float32)
    scale[scale == 0] = 1
    zero = np.clip(np.round(-lo / scale), 0, qmax)
    q = np.clip(np.round(g / scale[..., None]) + zero[..., None], 0, qmax)
    deq = (q - zero[..., None]) * scale[..., None]
    err = g - deq
    err2 = err * err
    sig2 = g * g
    group_mse = err2.mean(axis=-1)
    group_max = np.abs(err).max(axis=-1)
    group_rel = np.sqrt(err2.sum(axis=-1) / np.maximum(sig2.sum(axis=-1), 1e-30))
    total_err, total_sig = float(err2.sum(dtype=np.float64)), float(sig2.sum(dtype=np.float64))
    sqnr = 10 * np.log10(total_sig / total_err)
    col_max = np.abs(w).max(axis=0)
    col_rms = np.sqrt(sig2.reshape(rows, cols).mean(axis=0))
    col_err_rms = np.sqrt(err2.reshape(rows, cols).mean(axis=0))
    score = col_max / np.median(col_max)
    return deq.reshape(rows, cols), (group_mse, group_max, group_rel, sqnr, col_rms, col_err_rms, score)


def median_time(fn, repeats):
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return sorted(times)[len(times) // 2] * 1e3


def run_json(cmd):
    out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main():
    bench_case = os.environ["BENCH_CASE"]
    wasm_pkg = os.environ["WASM_PKG"]
    here = os.path.dirname(os.path.abspath(__file__))
    rows_out = []
    with tempfile.TemporaryDirectory() as tmp:
        for rows, cols in SHAPES:
            w = (np.random.default_rng(42).standard_normal((rows, cols), dtype=np.float32) * 0.02).astype(np.float32)
            for dtype in DTYPES:
                path = os.path.join(tmp, f"w_{rows}x{cols}_{dtype}.npy")
                np.save(path, w if dtype == "f32" else w.astype(np.float16))
                repeats = 9 if rows * cols <= 4096 * 4096 else 5
                single = run_json([bench_case, path, str(repeats), "1"])
                pooled = run_json([bench_case, path, str(repeats), "0"])
                wasm = run_json(["node", os.path.join(here, "wasm_case.mjs"), wasm_pkg, path, str(repeats)])
                source = np.load(path).astype(np.float32)
                numpy_ms = median_time(lambda: numpy_rtn(source), 3)
                del source
                f32_bytes = rows * cols * 4
                n = rows * cols
                rows_out.append(
                    (
                        f"{rows}×{cols} {dtype}",
                        single["analyze_ms"],
                        pooled["analyze_ms"],
                        wasm["analyze_ms"],
                        numpy_ms,
                        single["analyze_ms"] * 1e6 / n,
                        single["heap_peak_bytes"] / f32_bytes,
                        single["peak_bytes"] / f32_bytes,
                        wasm["peak_bytes"] / f32_bytes,
                        single["open_ms"],
                        wasm["open_ms"],
                        single["copy_ms"],
                    )
                )
                print(f"done {rows}x{cols} {dtype}", file=sys.stderr)
    cores = os.cpu_count()
    print(f"Measured {date.today().isoformat()} on {platform.machine()}, {cores} logical cores, "
          f"numpy {np.__version__}, Node {subprocess.run(['node', '--version'], capture_output=True, text=True).stdout.strip()}.")
    print()
    print("| case | native 1 thread | ns/weight | plain copy | native all cores | speed-up | wasm | wasm / native | numpy | numpy / native | peak native heap | peak native resident | peak wasm | open native | open wasm |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for case, one, pool, wasm, nump, ns, heap_n, peak_n, peak_w, open_n, open_w, copy in rows_out:
        print(f"| {case} | {one:.1f} ms | {ns:.2f} | {copy:.1f} ms | {pool:.1f} ms | {one / pool:.2f}× | {wasm:.1f} ms | {wasm / one:.2f}× | "
              f"{nump:.0f} ms | {nump / one:.1f}× | {heap_n:.2f}× | {peak_n:.2f}× | {peak_w:.2f}× | {open_n:.0f} ms | {open_w:.0f} ms |")


if __name__ == "__main__":
    main()
