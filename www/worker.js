// The page's compute worker: it owns the wasm instance, the open tensor and its latest analysis.
// Requests arrive as {id, type, ...}; replies are {id, ok, result} or {id, ok: false, error};
// progress goes out as {id, progress: [done, total]}. Bulk figures are transferred, not copied.
/* global wasm_bindgen, importScripts */
'use strict';

/** Pages of shared memory the threaded core starts with (more than its static data needs). */
const SHARED_MEMORY_PAGES = 256;

/** A refusal after which the worker no longer holds the tensor on screen: the bridge restarts it. */
class RestartAfter extends Error {}

let core = null;
let tensor = null;
let analysis = null;
let calib = null;

function replace(handle, next) {
  if (handle) handle.free();
  return next;
}

/**
 * The group whose histogram comes with a result: the one the page shows while it exists, else
 * the one with the largest error. It comes with the result, not as a request of its own, so that
 * it never waits behind a request sent meanwhile (a sweep clicked while a tensor opens).
 */
function shownGroup(groupMse, asked) {
  if (asked !== null && asked < groupMse.length) return asked;
  let worst = 0;
  for (let i = 1; i < groupMse.length; i++) if (groupMse[i] > groupMse[worst]) worst = i;
  return worst;
}

/** Plain figures of an analysis and the histogram `view` asks for, typed arrays listed for transfer. */
function analysisResult(a, view) {
  const arrays = {
    groupMse: a.groupMse(),
    groupRelErr: a.groupRelErr(),
    groupMaxErr: a.groupMaxErr(),
    columnMaxAbs: a.columnMaxAbs(),
    columnErrRms: a.columnErrRms(),
    columnOutlierScore: a.columnOutlierScore(),
    outputRowErr: a.outputRowErr(),
  };
  const group = shownGroup(arrays.groupMse, view.group);
  const histogram = a.groupHistogram(group, view.bins);
  return { value: { summary: a.summary(), group, histogram, ...arrays }, transfer: Object.values(arrays).map((x) => x.buffer) };
}

/** Run a recipe on a tensor with the calibration, when there is one. */
function run(t, recipe, progress) {
  return calib ? t.analyzeWith(recipe, progress, calib) : t.analyze(recipe, progress, undefined);
}

/**
 * Open a tensor and run the current recipe on it as one step: a tensor that cannot be analysed
 * because of NaN or infinite values is refused like a bad file (with the core's count and
 * place), so the tensor on screen, its result and the calibration stay.
 */
function openAndAnalyze(open, recipe, view, progress, incoming = () => null) {
  // A new tensor and its first run that cannot fit beside what the page holds (the core weighs
  // them against its memory): the tensor on screen gives way before the new one is read, and
  // should the new one then be refused, the bridge is asked to restart the worker, which reopens
  // the old one (its remembered open).
  const shape = tensor === null ? null : incoming();
  const makeRoom = shape !== null && !core.fitsBesideHeld(shape, recipe);
  if (makeRoom) {
    tensor = replace(tensor, null);
    analysis = replace(analysis, null);
  }
  let next = null;
  let info;
  try {
    next = open();
    info = next.info();
    if (info.nan + info.inf > 0) next.checkFinite();
  } catch (err) {
    next?.free();
    if (makeRoom && !(err instanceof WebAssembly.RuntimeError)) throw new RestartAfter(message(err));
    throw err;
  }
  // The new tensor replaces the one on screen whatever its first run gives, so that one and its
  // result give way now and their memory serves the run: a large layer opened after another
  // would otherwise hold both layers and both results at once, and fresh memory for the second
  // run's result took it from 0.1 s to 0.5 s on a 4096 × 14336 layer.
  tensor = replace(tensor, next);
  analysis = replace(analysis, null);
  // Calibration belongs to a weight's input width; a tensor of another width drops it.
  let calibDropped = false;
  if (calib && calib.info().cols !== info.cols) {
    calib = replace(calib, null);
    calibDropped = true;
  }
  let recipeError = null;
  try {
    analysis = run(tensor, recipe, progress);
  } catch (err) {
    recipeError = message(err);
  }
  if (!analysis) return { value: { info, recipeError, calibDropped } };
  const out = analysisResult(analysis, view);
  return { value: { info, calibDropped, ...out.value }, transfer: out.transfer };
}

/** The shape of the tensor `name` of `file` (the only one when `name` is null) from its header; null when it cannot be listed (opening it will say why). */
function shapeOf(file, name, bf16) {
  try {
    const { entries } = core.listFile(file, bf16);
    const entry = name === null || name === undefined ? entries[0] : entries.find((e) => e.name === name);
    return entry ? entry.shape : null;
  } catch {
    return null;
  }
}

function tensorCols() {
  if (!tensor) throw new Error('open a weight tensor first');
  return tensor.info().cols;
}

/** Replace the calibration only when the new one is valid; the old one stays otherwise. */
function setCalibration(make) {
  const next = make();
  calib = replace(calib, next);
  const maxAbs = next.maxAbs();
  return { value: { info: next.info(), maxAbs }, transfer: [maxAbs.buffer] };
}

function message(err) {
  return String((err && err.message) || err);
}

const handlers = {
  /**
   * Load the core. With `threads` > 0 (the threaded build, on a cross-origin isolated page) the
   * core gets a shared memory and a pool of that many workers on it; they must all be running
   * before the pool is built, because this worker then blocks while they compute.
   */
  async init({ wasm, threads, channel }) {
    if (typeof wasm_bindgen === 'undefined') importScripts(threads ? 'pkg-threads/bitloupe.js' : 'pkg/bitloupe.js');
    if (!threads) {
      await wasm_bindgen({ module_or_path: wasm });
    } else {
      const memory = new WebAssembly.Memory({ initial: SHARED_MEMORY_PAGES, maximum: 65536, shared: true });
      await wasm_bindgen({ module_or_path: wasm, memory });
      await Promise.all(Array.from({ length: threads }, () => new Promise((resolve, reject) => {
        const pool = new Worker('pool-worker.js');
        pool.onmessage = () => resolve();
        pool.onerror = (event) => {
          event.preventDefault();
          reject(new Error(`a pool worker could not start: ${event.message}`));
        };
        pool.postMessage({ module: wasm, memory, channel });
      })));
      wasm_bindgen.buildPool(threads);
    }
    core = wasm_bindgen;
    return { value: { defaults: core.recipeDefaults(), threads: Math.max(1, threads || 0) } };
  },
  /** Bring the engine's optimised code in before the first real analysis (see the core's warmUp). */
  warmUp() {
    core.warmUp();
    return { value: null };
  },
  modelSize({ files, pattern, include1d, params, recipe }) {
    return { value: core.modelSize(files, pattern, include1d, params, recipe) };
  },
  recipeFromLink({ text }) {
    return { value: core.recipeFromLink(text) };
  },
  recipeForFormat({ format }) {
    return { value: core.recipeForFormat(format) };
  },
  list({ file, bf16 }) {
    return { value: core.listFile(file, bf16) };
  },
  openDemo({ recipe, view }, progress) {
    return openAndAnalyze(() => core.demoWeight(), recipe, view, progress);
  },
  openFile({ file, name, bf16, recipe, view }, progress) {
    return openAndAnalyze(() => core.openFile(file, name ?? undefined, bf16), recipe, view, progress, () => shapeOf(file, name, bf16));
  },
  openText({ text, recipe, view }, progress) {
    return openAndAnalyze(() => core.parseText(text), recipe, view, progress);
  },
  calibFile({ file, name, kind, bf16 }) {
    return setCalibration(() => core.calibrationFromFile(file, name ?? undefined, kind, tensorCols(), bf16));
  },
  calibDemo() {
    return setCalibration(() => core.demoCalibration(tensorCols()));
  },
  calibClear() {
    calib = replace(calib, null);
    return { value: null };
  },
  smoothing({ alpha, act }, progress) {
    if (!tensor || !calib) throw new Error('the study needs a tensor and calibration data');
    return { value: tensor.smoothingStudy(calib, alpha, act, progress) };
  },
  smoothedColumns({ alpha }) {
    if (!tensor || !calib) throw new Error('smoothing needs calibration data');
    return { value: tensor.smoothedColumns(calib, alpha) };
  },
  analyze({ recipe, view }, progress) {
    if (!tensor) throw new Error('open a tensor first');
    const next = run(tensor, recipe, progress);
    analysis = replace(analysis, next);
    return analysisResult(next, view);
  },
  sweep({ spec, by }, progress) {
    if (!tensor) throw new Error('open a tensor first');
    const plan = core.sweepRecipes(spec);
    return { value: calib ? tensor.sweepWith(plan, by, progress, calib) : tensor.sweep(plan, by, progress) };
  },
  sweepFront({ rows, by }) {
    return { value: core.sweepFront(rows, by) };
  },
  histogram({ index, bins }) {
    if (!analysis) throw new Error('no analysis yet');
    return { value: analysis.groupHistogram(index, bins) };
  },
  reportJson() {
    if (!analysis) throw new Error('no analysis yet');
    return { value: analysis.reportJson() };
  },
  markdown() {
    if (!analysis) throw new Error('no analysis yet');
    return { value: analysis.markdown() };
  },
  groupsCsv() {
    if (!analysis) throw new Error('no analysis yet');
    return { value: analysis.groupsCsv() };
  },
  packed() {
    if (!analysis) throw new Error('no analysis yet');
    const bytes = analysis.packed();
    return { value: bytes, transfer: [bytes.buffer] };
  },
  dequantizedNpy() {
    if (!analysis) throw new Error('no analysis yet');
    const bytes = analysis.dequantizedNpy();
    return { value: bytes, transfer: [bytes.buffer] };
  },
};

// Requests run one after another, in the order they came: a request that arrives while the
// wasm module is still starting waits for it.
let queue = Promise.resolve();
self.onmessage = (event) => {
  queue = queue.then(() => handle(event));
};

/**
 * Progress goes out at most this often, the first once a run has lasted that long, with the
 * partial results (a sweep's rows) gathered since the last: each message makes the page draw a
 * frame, and on a machine with few cores that frame takes its time from the computation (a sweep
 * of 48 short runs that sent a row at a time spent a third of a core drawing them). A short run
 * sends none; its result, which holds every partial result too, follows at once.
 */
const PROGRESS_EVERY_MS = 200;

async function handle(event) {
  const { id, type, ...args } = event.data;
  let lastProgress = performance.now();
  let items = [];
  const progress = (done, total, item) => {
    if (item) items.push(item);
    const now = performance.now();
    if (now - lastProgress < PROGRESS_EVERY_MS) return;
    lastProgress = now;
    self.postMessage({ id, progress: [done, total], items });
    items = [];
  };
  // A failure noted before this request (one the core handled, say) is not this request's.
  core?.takePanicMessage();
  try {
    const handler = handlers[type];
    if (!handler) throw new Error(`unknown request ${type}`);
    const started = performance.now();
    const out = await handler(args, progress);
    self.postMessage({ id, ok: true, result: out.value, computeMs: performance.now() - started }, out.transfer || []);
  } catch (err) {
    // A trap (a panic, or memory exhausted) leaves the wasm instance unusable: report it (the
    // bridge words it), and let the bridge start a fresh worker.
    const fatal = err instanceof WebAssembly.RuntimeError;
    const panic = fatal && core ? core.takePanicMessage() : null;
    self.postMessage({ id, ok: false, error: panic || message(err), fatal, restart: err instanceof RestartAfter });
  }
}
