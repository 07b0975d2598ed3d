// One case of the speed table under Node (`bench/compare.py`): the same steps as the native
// `bench_case` example, through the wasm build's own exports. Prints one JSON line: the open
// time, the median analysis time, and the wasm memory's size after the first analysis
// (WebAssembly memory only grows, so that is the peak of opening the file and analysing it once).
// V8 first runs a module's functions as quickly compiled baseline code and swaps in optimised code
// once they prove hot, for their next call, compiling it in the background; the analysis is
// therefore run untimed for a while first, as a native benchmark's warm-up would, so that the
// median times the optimised code (the code the page runs once it has warmed up).
//
// Usage: node bench/wasm_case.mjs PKG_DIR FILE [REPEATS]
// PKG_DIR holds `wasm-bindgen --target nodejs` output of the release wasm.
import { createRequire } from 'node:module';
import { readFileSync } from 'node:fs';
import path from 'node:path';

const [pkgDir, file, repeatsArg] = process.argv.slice(2);
const core = createRequire(import.meta.url)(path.resolve(pkgDir, 'bitloupe.js'));
const repeats = Math.max(1, Number(repeatsArg ?? 5));
const bytes = readFileSync(file);

// The page opens a dropped file in ranges (its worker reads a File with FileReaderSync), so the
// file's bytes never sit whole in wasm memory. Node has neither; these stand-ins over the bytes
// read above give the core the same ranged reads, and the memory figure the page's.
class RangeBlob {
  constructor(whole, start = 0, end = whole.length) {
    Object.assign(this, { whole, start, end });
  }
  get size() {
    return this.end - this.start;
  }
  slice(from, to) {
    return new RangeBlob(this.whole, this.start + from, this.start + to);
  }
}
globalThis.FileReaderSync = class {
  readAsArrayBuffer(blob) {
    const at = blob.whole.byteOffset + blob.start;
    return blob.whole.buffer.slice(at, at + blob.size);
  }
};

/** Untimed analyses before the timed ones: at least this many, for at least WARM_UP_MS. */
const WARM_UP_RUNS = 8;
const WARM_UP_MS = 1000;

let start = performance.now();
const tensor = core.openFile(new RangeBlob(bytes), undefined, false);
const openMs = performance.now() - start;
const times = [];
let peakBytes;
const warmUpEnds = performance.now() + WARM_UP_MS;
for (let i = 0; times.length < repeats; i++) {
  start = performance.now();
  const analysis = tensor.analyze({}, undefined, undefined);
  if (i >= WARM_UP_RUNS && start >= warmUpEnds) times.push(performance.now() - start);
  analysis.free();
  // After one analysis, like the native runner.
  peakBytes ??= core.memoryBytes();
}
times.sort((a, b) => a - b);
console.log(JSON.stringify({
  open_ms: openMs,
  analyze_ms: times[Math.floor(times.length / 2)],
  peak_bytes: peakBytes,
  elements: JSON.parse(JSON.stringify(tensor.info())).elements,
}));
