// The page: controls, drawing and the flow between them. All computation happens in the worker
// behind the bridge; this thread only draws, so the page stays responsive.

import { CoreBridge, Cancelled } from './bridge.js';
import { ErrorMap } from './errormap.js';
import { SeriesChart, GroupHistogram, COMB_ABOVE_LEVELS, levelReach } from './charts.js';
import { DIVERGING_COLOURS, STOP_COLOURS } from './colors.js';
import * as fmt from './format.js';
import { pictureSvg, pngOf, seriesSvg } from './svg.js';

const $ = (id) => document.getElementById(id);
const TEXT_FILE = /\.(txt|csv|tsv)$/i;
const GROUP_CHOICES = [8, 16, 32, 64, 128, 256, 512, 1024, 2048, 4096];
const SHOW_PROGRESS_AFTER_MS = 150;
const HISTOGRAM_BINS = 64;

/** Timings of finished steps, read by the in-browser benchmark (bench/page.mjs). */
const timings = (window.bitloupeTimings = []);

/**
 * Resolves once the browser has drawn the page as it stands, so that a run started next does not
 * share the cores with drawing the control that started it (on a machine with few cores that
 * frame would slow every worker of the pool). A hidden tab draws no frames; the timeout lets the
 * run start there too.
 */
function afterNextFrame() {
  return new Promise((resolve) => {
    const fallback = setTimeout(resolve, 100);
    requestAnimationFrame(() => setTimeout(() => {
      clearTimeout(fallback);
      resolve();
    }));
  });
}

/** Record how long a step took once the browser has painted its result. */
function recordTiming(what, started) {
  requestAnimationFrame(() => timings.push({ what, ms: performance.now() - started }));
}

const state = {
  defaults: null,
  statusText: '',
  info: null,
  result: null,
  listing: null,
  file: null,
  selectedGroup: null,
  selectedColumn: null,
  calib: null,
  study: null,
  /** Each error map's title and colour scale ({title, legend}) by its canvas's id, for its files. */
  pictures: {},
};

// ------------------------------------------------------------------ worker bridge

/** The core, compiled once here from a script rather than fetched, so that the page and its
 * workers can forbid every connection (connect-src 'none'). */
/** Most pool workers the page starts, whatever the core count (memory use grows with each). */
const MAX_POOL_WORKERS = 8;

/**
 * Pool workers for the threaded core: one per logical core (capped), or `?threads=N` from the
 * address (`?threads=0`: the single-threaded core). Shared memory needs a cross-origin isolated page; elsewhere (a host without those
 * headers, the single file opened from disk) the single-threaded core runs instead.
 */
function poolSize() {
  if (!self.crossOriginIsolated || config.wasm) return 0;
  const asked = new URLSearchParams(location.search).get('threads');
  const wanted = asked !== null && Number(asked) >= 0 ? Number(asked) : navigator.hardwareConcurrency || 1;
  return Math.min(Math.floor(wanted), MAX_POOL_WORKERS);
}

async function compileCore(pkg) {
  const { default: base64 } = await import(`./${pkg}/bitloupe_core.js`);
  const text = atob(base64);
  const bytes = new Uint8Array(text.length);
  for (let i = 0; i < text.length; i++) bytes[i] = text.charCodeAt(i);
  return WebAssembly.compile(bytes);
}

const config = window.BITLOUPE_CONFIG || {};
const threads = poolSize();
const core = config.wasm ?? await compileCore(threads ? 'pkg-threads' : 'pkg').catch((err) => {
  $('status').textContent = `The page could not load its compute core: ${err.message}`;
  throw err;
});
const bridge = new CoreBridge(config.makeWorker || (() => new Worker('worker.js')), core, threads);
bridge.onRestart = (reason) => {
  if (!(reason instanceof Cancelled)) showMessage('input-message', reason.message);
};

let busyTimer = null;
let running = 0;

/** Run one request with the progress bar and cancel button; returns null when cancelled.
 * `onItems` receives the partial results that arrive with each progress message. */
async function task(label, type, payload, remember, onItems = null) {
  running += 1;
  const progress = $('progress');
  progress.removeAttribute('value');
  clearTimeout(busyTimer);
  // The status line changes only once the run proves slow: a change redraws the page, and on a
  // machine with few cores that frame takes its time from the workers computing the result.
  busyTimer = setTimeout(() => {
    $('status').textContent = `${label}…`;
    $('busy').hidden = false;
  }, SHOW_PROGRESS_AFTER_MS);
  try {
    await afterNextFrame();
    // The run's time shown to the user starts when it is sent, not with the wait for the frame.
    const started = performance.now();
    const result = await bridge.request(type, payload, {
      remember,
      onProgress: (done, total, items) => {
        progress.max = total;
        progress.value = done;
        if (onItems) onItems(items, done, total, performance.now() - started);
      },
    });
    result.elapsedMs = performance.now() - started;
    return result;
  } catch (err) {
    if (err instanceof Cancelled) {
      $('status').textContent = 'Cancelled; the previous results are still shown.';
      return null;
    }
    throw err;
  } finally {
    running -= 1;
    if (running === 0) {
      clearTimeout(busyTimer);
      $('busy').hidden = true;
    }
  }
}

$('cancel').addEventListener('click', () => bridge.cancel());

// ------------------------------------------------------------------ messages

function showMessage(id, text) {
  const el = $(id);
  el.textContent = text;
  el.hidden = !text;
}

// ------------------------------------------------------------------ recipe controls

function buildControls(defaults) {
  const bits = $('bits');
  for (let b = defaults.bits[0]; b <= defaults.bits[1]; b++) bits.add(new Option(`${b}`, `${b}`));
  const granularity = $('granularity');
  granularity.add(new Option('the whole tensor', 'tensor'));
  granularity.add(new Option('each output row', 'row'));
  for (const g of GROUP_CHOICES.filter((g) => g >= defaults.group_sizes[0] && g <= defaults.group_sizes[1])) {
    granularity.add(new Option(`groups of ${g}`, `${g}`));
  }
  setRecipe(defaults.recipe);
  $('format').addEventListener('change', async () => {
    // A new format brings its usual block size, scale type and grid; the method and outlier
    // choices stay.
    const defaults = await bridge.request('recipeForFormat', { format: $('format').value });
    const current = readRecipe();
    setRecipe({ ...current, format: defaults.format, bits: defaults.bits, granularity: defaults.granularity, symmetric: defaults.symmetric, scale_dtype: defaults.scale_dtype, double_quant: false });
    showDependentControls();
    analyze();
  });
  const controls = ['double-quant', 'bits', 'granularity', 'symmetric', 'scale-dtype', 'method', 'damp', 'act-order', 'awq-clip', 'keep', 'keep-frac', 'smooth-on', 'smooth-alpha'];
  for (const id of controls) {
    $(id).addEventListener('change', () => {
      showDependentControls();
      analyze();
    });
  }
  // A count the recipe cannot hold is refused here: 0 would mean keeping no column at all.
  $('keep-cols').addEventListener('change', () => {
    const typed = $('keep-cols').value;
    const count = Number(typed);
    if (typed.trim() === '' || !Number.isInteger(count) || count < 1) {
      $('keep-cols').value = keptColumns;
      showMessage('recipe-message', `The number of columns kept must be a whole number of at least 1${typed.trim() ? `, not ${typed}` : ''}; it is back to ${keptColumns}.`);
      return;
    }
    keptColumns = typed;
    analyze();
  });
  $('smooth-alpha').addEventListener('input', () => {
    $('smooth-alpha-out').textContent = `α ${Number($('smooth-alpha').value).toFixed(2)}`;
    showSmoothedColumns();
  });
  showDependentControls();
}

/** Show only the controls that apply to the chosen format, method and outlier treatment. */
function showDependentControls() {
  const format = $('format').value;
  const mx = format.startsWith('mx');
  const shown = new Set([
    $('method').value,
    format,
    $('keep').value === 'cols' ? 'keep-cols' : '',
    $('keep').value === 'frac' ? 'keep-frac' : '',
    format === 'int' || format === 'codebook' ? 'bits' : '',
    mx ? '' : 'granularity',
    mx || format === 'codebook' ? '' : 'scale',
  ]);
  for (const el of document.querySelectorAll('[data-show]')) el.hidden = !shown.has(el.dataset.show);
  $('smooth-alpha').disabled = !$('smooth-on').checked && !state.calib;
}

/** The last count of kept columns that was valid, to put back a refused one. */
let keptColumns = $('keep-cols').value;
/** The last share of weights kept (in %) that a recipe used, to put back a refused one. */
let keptShare = $('keep-frac').value;

/**
 * Settles once the worker has started and the recipe's controls are built from the core's
 * defaults: an action taken sooner (a click on the demo while the page loads) waits for it
 * rather than reading controls that are still empty.
 */
let pageReady = null;

/** The recipe on screen, once the page is ready. */
async function readyRecipe() {
  await pageReady;
  return readRecipe();
}

function readRecipe() {
  const g = $('granularity').value;
  const keep = $('keep').value;
  return {
    format: $('format').value,
    double_quant: $('double-quant').checked,
    bits: Number($('bits').value),
    granularity: g === 'tensor' || g === 'row' ? g : { group: Number(g) },
    symmetric: $('symmetric').value === 'true',
    scale_dtype: $('scale-dtype').value,
    method: $('method').value,
    damp: Number($('damp').value),
    act_order: $('act-order').checked,
    awq_clip: $('awq-clip').checked,
    smooth: $('smooth-on').checked ? Number($('smooth-alpha').value) : null,
    keep_cols: keep === 'cols' ? Number($('keep-cols').value) : 0,
    keep_frac: keep === 'frac' ? Number($('keep-frac').value) / 100 : 0,
  };
}

function setRecipe(recipe) {
  $('format').value = recipe.format;
  $('double-quant').checked = recipe.double_quant;
  $('bits').value = String(recipe.bits);
  const granularity = typeof recipe.granularity === 'string' ? recipe.granularity : String(recipe.granularity.group);
  // A link or a format may bring a group size the list does not offer; it joins the list.
  if (![...$('granularity').options].some((o) => o.value === granularity)) {
    $('granularity').add(new Option(`groups of ${granularity}`, granularity));
  }
  $('granularity').value = granularity;
  $('symmetric').value = String(recipe.symmetric);
  $('scale-dtype').value = recipe.scale_dtype;
  $('method').value = recipe.method;
  $('damp').value = String(Number(recipe.damp.toPrecision(6)));
  $('act-order').checked = recipe.act_order;
  $('awq-clip').checked = recipe.awq_clip;
  $('smooth-on').checked = recipe.smooth !== null;
  if (recipe.smooth !== null) $('smooth-alpha').value = String(recipe.smooth);
  $('keep').value = recipe.keep_cols > 0 ? 'cols' : recipe.keep_frac > 0 ? 'frac' : 'none';
  if (recipe.keep_cols > 0) $('keep-cols').value = keptColumns = String(recipe.keep_cols);
  // The core holds the fraction in f32: 0.5 % comes back as 0.4999999888 % without the rounding.
  // A recipe that keeps no share puts back the last share that was used, not one that was refused.
  if (recipe.keep_frac > 0) keptShare = String(Number((recipe.keep_frac * 100).toPrecision(6)));
  $('keep-frac').value = keptShare;
}

// ------------------------------------------------------------------ opening tensors

/** The end of a refusal to open something: what stays on screen. */
function stillOpen() {
  return state.info ? ' The tensor you had stays open.' : '';
}

/** Open a tensor (`what` names it in a refusal) and run the current recipe on it. */
async function open(label, type, payload, what) {
  showMessage('input-message', '');
  const started = performance.now();
  try {
    const result = await task(label, type, { ...payload, recipe: await readyRecipe(), view: resultView(true) }, 'open');
    if (!result) return;
    state.info = result.info;
    showInfo(result.info);
    // A sweep belongs to the tensor it ran on.
    sweep.rows = [];
    drawSweep();
    $('sweep-status').textContent = '';
    // A note about calibration (one asked for before any tensor was open, say) is out of date.
    showMessage('calib-message', '');
    if (result.calibDropped) {
      // Said where the user acted, at the top of the page: the calibration card may be out of view.
      const cols = state.calib?.info.cols;
      setCalibration(null);
      bridge.forget('calib');
      showMessage('input-message', `The calibration${cols ? ` (${fmt.plural(cols, 'column')})` : ''} was removed: this tensor has ${fmt.plural(result.info.cols, 'input column')}. Add calibration of that width to measure the output error.`);
    }
    if (result.recipeError) {
      // The new tensor has replaced the old one and its results in the worker: none stand now.
      state.result = null;
      $('report').hidden = true;
      $('empty').hidden = false;
      $('empty-text').textContent = 'No results for this tensor yet: the recipe could not be applied to it. Change the recipe on the left.';
      showRecipeError(result.recipeError);
      state.statusText = $('status').textContent;
    } else {
      showResults(result, { fresh: true });
      recordTiming('open-to-drawn', started);
    }
    // Pins taken on the tensor before stay, named as such.
    showCompare();
  } catch (err) {
    showMessage('input-message', `Could not open ${what}: ${err.message}.${stillOpen()}`);
    restoreStatus();
  }
}

async function openFile(file) {
  showMessage('input-message', '');
  if (TEXT_FILE.test(file.name)) {
    const text = await file.text();
    // A binary file under a text name would fill the paste box with junk and leave it there.
    if (text.includes('\0')) {
      const npy = text.startsWith('\u0093NUMPY') || text.startsWith('\ufffdNUMPY');
      showMessage('input-message', `Could not open ${file.name}: it holds binary data, not a text matrix${npy ? ' (it is a NumPy .npy file; give it the .npy extension)' : ''}.${stillOpen()}`);
      return;
    }
    $('paste').value = text;
    return open(`Reading ${file.name}`, 'openText', { text }, file.name);
  }
  const bf16 = $('bf16').checked;
  const started = performance.now();
  try {
    const listing = await task(`Reading the header of ${file.name}`, 'list', { file, bf16 });
    if (!listing) return;
    state.file = file;
    state.listing = listing;
    if (listing.entries.length === 1) {
      $('tensor-list').hidden = true;
      return open(`Reading ${file.name}`, 'openFile', { file, name: null, bf16 }, file.name);
    }
    showListing(file, listing);
    $('status').textContent = `${listing.entries.length} tensors in ${file.name}: choose one.`;
    recordTiming('list', started);
  } catch (err) {
    showMessage('input-message', `Could not open ${file.name}: ${err.message}.${stillOpen()}`);
    restoreStatus();
  }
}

function showListing(file, listing) {
  $('listing-file').textContent = file.name;
  $('tensor-filter').value = '';
  renderListing();
  $('tensor-list').hidden = false;
}

function renderListing() {
  const filter = $('tensor-filter').value.trim().toLowerCase();
  const body = $('tensor-rows');
  body.replaceChildren();
  for (const entry of state.listing.entries) {
    if (filter && !entry.name.toLowerCase().includes(filter)) continue;
    const tr = document.createElement('tr');
    const button = document.createElement('button');
    button.type = 'button';
    button.textContent = entry.name;
    button.addEventListener('click', () => {
      for (const row of body.children) row.classList.remove('current');
      tr.classList.add('current');
      open(`Reading ${entry.name}`, 'openFile', { file: state.file, name: entry.name, bf16: $('bf16').checked }, `${entry.name} of ${state.file.name}`);
    });
    // The whole row answers a click; the button keeps it reachable from the keyboard.
    tr.addEventListener('click', (event) => {
      if (!button.contains(event.target)) button.click();
    });
    const cells = [button, entry.dtype_label, fmt.shape(entry.shape), fmt.bytes(entry.bytes)];
    for (const content of cells) {
      const td = document.createElement('td');
      td.append(content);
      tr.append(td);
    }
    body.append(tr);
  }
}

$('tensor-filter').addEventListener('input', renderListing);
$('file-input').addEventListener('change', (e) => {
  const file = e.target.files[0];
  e.target.value = '';
  if (file) openFile(file);
});
for (const id of ['load-demo', 'load-demo-big']) {
  $(id).addEventListener('click', () => {
    $('tensor-list').hidden = true;
    open('Generating the demo tensor', 'openDemo', {}, 'the demo tensor');
  });
}
$('use-paste').addEventListener('click', () => {
  $('tensor-list').hidden = true;
  open('Reading the pasted matrix', 'openText', { text: $('paste').value }, 'the pasted matrix');
});

// Drop anywhere on the page.
let dragDepth = 0;
window.addEventListener('dragenter', (e) => {
  if (![...(e.dataTransfer?.types || [])].includes('Files')) return;
  dragDepth += 1;
  $('drop-overlay').hidden = false;
});
window.addEventListener('dragleave', () => {
  dragDepth = Math.max(0, dragDepth - 1);
  if (dragDepth === 0) $('drop-overlay').hidden = true;
});
window.addEventListener('dragover', (e) => e.preventDefault());
window.addEventListener('drop', (e) => {
  e.preventDefault();
  dragDepth = 0;
  $('drop-overlay').hidden = true;
  const file = e.dataTransfer?.files?.[0];
  if (file) openFile(file);
});

// ------------------------------------------------------------------ calibration

async function loadCalibration(label, type, payload) {
  showMessage('calib-message', '');
  if (!state.info) {
    showMessage('calib-message', 'Open a weight tensor first: calibration is checked against its input columns.');
    return;
  }
  try {
    const result = await task(label, type, payload, 'calib');
    if (!result) return;
    setCalibration(result);
    analyze();
  } catch (err) {
    showMessage('calib-message', `Could not use it: ${err.message}. ${state.calib ? 'The previous calibration stays.' : 'The weight-only analysis goes on.'}`);
    restoreStatus();
  }
}

function setCalibration(result) {
  state.calib = result;
  state.study = null;
  $('calib-clear').hidden = !result;
  const info = result?.info;
  $('calib-info').textContent = !info
    ? 'None: the figures are weight-only.'
    : info.tokens
      ? `${info.name || 'sample'}: ${fmt.plural(info.tokens, 'token')} × ${fmt.plural(info.cols, 'column')}.`
      : `${info.name || 'statistics'}: ${info.kind === 'maxabs' ? 'max |x|' : 'mean |x|'} of ${fmt.count(info.cols)} columns (output error is estimated from them).`;
  const out = $('map-metric').querySelector('option[value=out]');
  out.disabled = !result;
  if (!result && $('map-metric').value === 'out') $('map-metric').value = 'rel';
  showDependentControls();
}

/** A calibration file: its only tensor at once, or a choice when it holds several. */
async function openCalibrationFile(file) {
  showMessage('calib-message', '');
  $('calib-pick').hidden = true;
  const load = (name) => loadCalibration(`Reading ${file.name}`, 'calibFile', { file, name, kind: $('calib-kind').value, bf16: $('bf16').checked });
  if (TEXT_FILE.test(file.name)) {
    showMessage('calib-message', 'Calibration must be a .npy or .safetensors file.');
    return;
  }
  try {
    const listing = await bridge.request('list', { file, bf16: $('bf16').checked });
    if (listing.entries.length === 1) {
      load(null);
      return;
    }
    const select = $('calib-tensor');
    select.replaceChildren(new Option('choose a tensor…', ''), ...listing.entries.map((e) => new Option(`${e.name} (${fmt.shape(e.shape)})`, e.name)));
    select.onchange = () => select.value && load(select.value);
    $('calib-pick').hidden = false;
  } catch (err) {
    showMessage('calib-message', `Could not open ${file.name}: ${err.message}.`);
  }
}

$('calib-input').addEventListener('change', (e) => {
  const file = e.target.files[0];
  e.target.value = '';
  if (file) openCalibrationFile(file);
});
// A file dropped on the calibration box is calibration, not a new weight.
$('calib-card').addEventListener('dragover', (e) => e.preventDefault());
$('calib-card').addEventListener('drop', (e) => {
  e.preventDefault();
  e.stopPropagation();
  dragDepth = 0;
  $('drop-overlay').hidden = true;
  const file = e.dataTransfer?.files?.[0];
  if (file) openCalibrationFile(file);
});
$('calib-demo').addEventListener('click', () => loadCalibration('Generating the demo activations', 'calibDemo', {}));
$('calib-clear').addEventListener('click', async () => {
  await bridge.request('calibClear');
  bridge.forget('calib');
  setCalibration(null);
  analyze();
});

/** After a failed step, show again what the status said about the results on screen. */
function restoreStatus() {
  $('status').textContent = state.statusText || 'Load the demo tensor or drop a file to begin.';
}

function showInfo(info) {
  const dl = $('tensor-info');
  const facts = [
    ['name', info.name || '(unnamed)'],
    ['shape', `${fmt.shape(info.shape)}${info.shape.length !== 2 ? ` (viewed as ${info.rows} × ${info.cols})` : ''}`],
    ['dtype', info.dtype],
    ['elements', fmt.count(info.elements)],
    ['range', info.min === null ? '–' : `${fmt.sci(info.min)} … ${fmt.sci(info.max)}`],
    ['NaN / inf', `${fmt.count(info.nan)} / ${fmt.count(info.inf)}`],
  ];
  dl.replaceChildren();
  for (const [k, v] of facts) {
    const dt = document.createElement('dt');
    dt.textContent = k;
    const dd = document.createElement('dd');
    dd.textContent = v;
    if (k === 'NaN / inf' && info.nan + info.inf > 0) dd.className = 'warn';
    dl.append(dt, dd);
  }
  dl.hidden = false;
}

// ------------------------------------------------------------------ analysis

let analysing = false;
let again = false;

/** Re-run the current recipe; changes made while one run is going coalesce into one more run. */
async function analyze() {
  if (!state.info) return;
  if (analysing) {
    again = true;
    return;
  }
  analysing = true;
  showMessage('recipe-message', '');
  const started = performance.now();
  try {
    const result = await task('Quantizing', 'analyze', { recipe: readRecipe(), view: resultView(!state.result) }, 'analyze');
    if (result) {
      // Fresh when no results stand (a new tensor whose first recipe failed): nothing to keep.
      showResults(result, { fresh: !state.result });
      recordTiming('recipe-to-drawn', started);
      timings.push({ what: 'recipe-compute', ms: bridge.lastComputeMs });
    } else {
      restoreShownRecipe();
    }
  } catch (err) {
    showRecipeError(err.message);
    restoreShownRecipe();
  } finally {
    analysing = false;
    if (again) {
      again = false;
      analyze();
    }
  }
}

/** After a run that failed or was cancelled, put back the recipe of the results on screen, so
 * that the controls, the results, the exports and the link describe one recipe. */
function restoreShownRecipe() {
  if (!state.result) return;
  setRecipe(state.result.summary.recipe);
  showDependentControls();
}

function showRecipeError(message) {
  showMessage('recipe-message', state.result ? `${message}. The results below are from the last recipe that worked.` : `${message}.`);
  $('status').textContent = state.result ? 'That recipe was refused; the last one that worked is shown.' : 'This recipe cannot be applied to this tensor.';
}

const map = new ErrorMap($('error-map'), { onHover: hoverGroup, onSelect: selectGroup });
const profile = new SeriesChart($('column-profile'), { xLabel: 'input column', yLabel: 'max |w| (log)', rightLabel: 'error RMS (log)', logY: true, onSelect: selectColumn });
const methodCurve = new SeriesChart($('method-curve'), { xLabel: 'α', yLabel: 'output error' });
const smoothColumns = new SeriesChart($('smooth-columns'), { xLabel: 'input column', yLabel: 'max |value| (log)', logY: true });
const smoothCurve = new SeriesChart($('smooth-curve'), { xLabel: 'α', yLabel: 'W8A8 output error', logY: true });

const indices = (n) => Float64Array.from({ length: n }, (_, i) => i);

function showColumnProfile(result) {
  const marks = Array.from(result.columnMaxAbs, (v, i) => (result.columnOutlierScore[i] >= 4 ? v : null));
  const series = [
    { label: 'max |w|', values: result.columnMaxAbs, colour: '--series1' },
    { label: 'error RMS', values: result.columnErrRms, colour: '--series2', scale: 'right' },
    { label: 'outlier', values: marks, colour: '--accent', points: true },
  ];
  if (state.calib) series.push({ label: 'max |x| (calibration)', values: state.calib.maxAbs, colour: '--part2' });
  profile.setData(indices(result.columnMaxAbs.length), series);
}

function showMethod(method) {
  const lines = {
    rtn: () => null,
    clip: () => `Clipping search: the chosen range ratio averages ${method.mean_ratio.toFixed(3)}, ranked by ${method.output_weighted ? 'output-weighted error (diagonal of XᵀX)' : 'weight MSE'}.`,
    hqq: () => `HQQ: ${method.mean_iterations.toFixed(1)} iterations per group on average; l${method.p.toFixed(1)} error ${fmt.sci(method.lp_before)} → ${fmt.sci(method.lp_after)} (${fmt.percent(1 - method.lp_after / method.lp_before)} lower). Zero points are real numbers stored in the scale's type.`,
    gptq: () => `GPTQ: dampening ${Number(method.damp.toPrecision(4))}, ${method.act_order ? 'columns by decreasing diag(H)' : 'columns in order'}, ${fmt.plural(method.dead_columns, 'column')} without input; accumulated quadratic loss ${fmt.sci(method.quadratic_loss)}.`,
    awq: () => `AWQ: the α search chose α = ${method.alpha.toFixed(2)}${method.clip ? ', then a clipping ratio per group' : ''}${method.estimated ? ' (errors estimated from per-column statistics)' : ''}.`,
  };
  const text = lines[method.name]();
  $('method-card').hidden = !text;
  $('method-figures').textContent = text || '';
  const curve = method.name === 'awq' ? method.curve : null;
  $('method-curve').hidden = !curve;
  if (curve) {
    methodCurve.setData(Float64Array.from(curve, (p) => p[0]), [{ label: 'output error', values: Float64Array.from(curve, (p) => p[1]), colour: '--series1' }]);
    methodCurve.mark(method.alpha);
  }
}

// ------------------------------------------------------------------ smoothing

function showSmoothing() {
  const ready = Boolean(state.calib && state.info);
  $('smoothing-card').hidden = !ready;
  if (!ready) return;
  $('study-run').disabled = !state.calib.info.tokens;
  $('study-run').title = state.calib.info.tokens ? '' : 'The W8A8 study needs an activation sample, not only statistics.';
  showSmoothedColumns();
  showStudy();
}

let smoothingRequest = 0;

/** The per-column ranges before and after smoothing at the slider's α (cheap: runs on every move). */
async function showSmoothedColumns() {
  if (!state.calib || !state.result) return;
  const alpha = Number($('smooth-alpha').value);
  const ticket = ++smoothingRequest;
  try {
    const after = await bridge.request('smoothedColumns', { alpha });
    if (ticket !== smoothingRequest) return;
    smoothColumns.setData(indices(after.weight.length), [
      { label: 'max |w| before', values: state.result.columnMaxAbs, colour: '--series1' },
      // Smoothing makes both maxima of a column equal at α 0.5: the weights' line is drawn wide
      // and the activations' dashed over it, so that neither hides the other.
      { label: `max |w| after (α ${alpha.toFixed(2)})`, values: Float32Array.from(after.weight), colour: '--series2', width: 3 },
      { label: 'max |x| before', values: state.calib.maxAbs, colour: '--part2' },
      { label: 'max |x| after', values: Float32Array.from(after.act), colour: '--accent', width: 1.5, dash: [6, 4] },
    ]);
    smoothCurve.mark(alpha);
  } catch (err) {
    if (!(err instanceof Cancelled)) $('smooth-figures').textContent = `No smoothing profile: ${err.message}`;
  }
}

function showStudy() {
  const st = state.study;
  if (!st) {
    $('smooth-figures').textContent = state.calib?.info.tokens ? 'Run the W8A8 study to see the output error across α.' : 'The W8A8 study needs an activation sample.';
    return;
  }
  smoothCurve.setData(Float64Array.from(st.curve, (p) => p[0]), [{ label: 'W8A8 output error', values: Float64Array.from(st.curve, (p) => p[1]), colour: '--series1' }]);
  smoothCurve.mark(Number($('smooth-alpha').value));
  $('smooth-figures').textContent = `W8A8 with activations ${st.act === 'token' ? 'per token' : 'per tensor'}: output error ${fmt.percent(st.error_without)} without smoothing, ${fmt.percent(st.error_with)} with α = ${st.alpha.toFixed(2)}; the lowest on the curve is at α = ${st.best_alpha.toFixed(2)}.`;
}

$('study-run').addEventListener('click', async () => {
  try {
    const study = await task('Running the W8A8 study', 'smoothing', { alpha: Number($('smooth-alpha').value), act: $('study-act').value });
    if (!study) return;
    state.study = study;
    showStudy();
    restoreStatus();
  } catch (err) {
    $('smooth-figures').textContent = `The study could not run: ${err.message}`;
    restoreStatus();
  }
});
const histogram = new GroupHistogram($('histogram'));

function showResults(result, { fresh }) {
  state.result = result;
  const s = result.summary;
  $('empty').hidden = true;
  $('report').hidden = false;
  showMessage('recipe-message', '');
  const calibrated = s.output_rel_err === null ? '' : ' with calibration';
  state.statusText = `${s.label} on ${s.tensor.name || 'the tensor'}${calibrated} · analysed in ${Math.round(result.elapsedMs)} ms`;
  writeLink();
  $('status').textContent = state.statusText;

  $('fig-bpw').textContent = s.bits_per_weight.toFixed(4);
  const elementBits = Math.round(s.cost.payload_bits / s.cost.elements);
  $('fig-bpw-sub').textContent = s.recipe.format === 'codebook'
    ? `${elementBits}-bit codes + codebook levels`
    : `${elementBits}-bit codes + scales${s.cost.zero_point_bits ? ' + zero points' : ''}`;
  $('fig-size').textContent = fmt.bytes(s.bytes);
  $('fig-size-sub').textContent = `${s.cost.ratio_to_source.toFixed(2)}× smaller than ${s.tensor.dtype} · ${s.cost.ratio_to_16bit.toFixed(2)}× smaller than 16-bit`;
  $('fig-sqnr').textContent = s.exact ? 'exact' : `${s.sqnr_db.toFixed(2)} dB`;
  $('fig-rel').textContent = fmt.percent(s.rel_fro_err);
  $('fig-max').textContent = fmt.sci(s.max_abs_err);
  $('fig-output-card').hidden = s.output_rel_err === null;
  if (s.output_rel_err !== null) {
    $('fig-output').textContent = fmt.percent(s.output_rel_err);
    $('fig-output-sub').textContent = s.output_estimated ? 'estimated from per-column statistics' : 'on the calibration sample';
  }
  showMethod(s.method);
  showSmoothing();

  drawMap(!fresh);
  showColumnProfile(result);
  showOutlierList(s);
  drawBudget(s);
  $('caution').textContent = s.caution;

  // A selection stays while its group exists; otherwise the worker chose the worst group, and
  // the column selection starts from the largest outlier.
  if (fresh || state.selectedGroup === null || state.selectedGroup >= result.groupMse.length) {
    state.selectedGroup = result.group;
    state.selectedColumn = s.outlier_columns.length ? s.outlier_columns[0].column : null;
  }
  map.setSelectedGroup($('map-metric').value === 'out' ? null : state.selectedGroup);
  selectColumn(state.selectedColumn);
  // The result brings the histogram of the group selected when it was asked for; a group clicked
  // while it ran is asked for now.
  if (state.selectedGroup === result.group) drawHistogram(result.histogram);
  else showHistogram(state.selectedGroup);
}

/** The histogram a result brings: that of the selected group, or for a fresh result (`fresh`) of
 * the group with the largest error. */
function resultView(fresh) {
  return { group: fresh ? null : state.selectedGroup, bins: HISTOGRAM_BINS };
}

const METRICS = {
  out: { key: 'outputRowErr', label: 'output error ‖x(ŵ − w)‖ / ‖xw‖ of each output row', log: true, perRow: true },
  rel: { key: 'groupRelErr', label: 'relative error ‖w − ŵ‖ / ‖w‖ of each group', log: true },
  mse: { key: 'groupMse', label: 'mean squared error of each group', log: true },
  max: { key: 'groupMaxErr', label: 'largest absolute error in each group', log: true },
};

function drawMap(keepView) {
  const { result } = state;
  if (!result) return;
  const s = result.summary;
  const metric = METRICS[$('map-metric').value];
  const g = s.groups;
  const cols = state.info.cols;
  // Keep cells roughly in proportion to the matrix, within readable bounds.
  const canvas = $('error-map');
  const proportional = canvas.clientWidth * (state.info.rows / Math.max(cols, 1));
  const height = Math.round(Math.min(520, Math.max(140, proportional), Math.max(140, g.rows * 48)));
  canvas.style.height = `${height}px`;
  const grid = metric.perRow ? { rows: state.info.rows, per_row: 1, group_size: null } : g;
  map.setData({ rows: grid.rows, perRow: grid.per_row, cols, groupSize: grid.group_size, values: result[metric.key], log: metric.log }, { keepView });
  // A per-row map has no input columns to point at.
  map.setSelectedColumn(metric.perRow ? null : state.selectedColumn);
  const what = metric.perRow ? 'one cell per output row' : g.group_size ? `groups of ${g.group_size} along each row` : g.rows === 1 ? 'the whole tensor as one group' : 'one group per row';
  const described = `${fmt.plural(grid.rows, 'row')} × ${fmt.plural(grid.per_row, 'cell')} (${what})`;
  const click = metric.perRow ? '' : ', click a cell for its histogram';
  $('map-caption').textContent = `${described}; colour: ${metric.label}, log scale. Scroll or press + and − to zoom, drag to pan${click}.`;
  const { lo, hi } = map.range();
  // The map's file: its title says what it shows (not how to use the page), its scale is drawn.
  showPicture('error-map', `Error map: ${described}`, { lo: fmt.sci(lo), hi: fmt.sci(hi), label: `${metric.label}, log scale`, colours: STOP_COLOURS });
}

/**
 * An error map's colour scale under it on the page (its low end, colours and high end; the caption
 * beside the map says what they measure), kept with the map's title for its files.
 * legend: { lo, hi, label, colours }, as `pictureSvg` draws it.
 */
function showPicture(id, title, legend) {
  state.pictures[id] = { title, legend };
  const end = (text, which) => {
    const span = document.createElement('span');
    span.className = which;
    span.textContent = text;
    return span;
  };
  const ramp = end('', 'ramp');
  ramp.style.background = `linear-gradient(to right, ${legend.colours.join(', ')})`;
  document.querySelector(`.legend[data-for="${id}"]`).replaceChildren(end(legend.lo, 'lo'), ramp, end(legend.hi, 'hi'));
}

$('map-metric').addEventListener('change', () => {
  drawMap(false);
  map.setSelectedGroup($('map-metric').value === 'out' ? null : state.selectedGroup);
});
$('zoom-in').addEventListener('click', () => map.zoom(0.8));
$('zoom-out').addEventListener('click', () => map.zoom(1.25));
$('zoom-reset').addEventListener('click', () => map.reset());

function groupColumns(index) {
  const g = state.result.summary.groups;
  const cols = state.info.cols;
  if (!g.group_size) return [0, cols - 1];
  const k = index % g.per_row;
  return [k * g.group_size, Math.min(cols, (k + 1) * g.group_size) - 1];
}

function hoverGroup(hit, event) {
  const tip = $('map-tooltip');
  if (hit && $('map-metric').value === 'out') {
    showTip(tip, [`output row ${hit.row}`, `output error ${fmt.percent(state.result.outputRowErr[hit.row])}`], event);
    return;
  }
  if (!hit || !state.result) {
    tip.hidden = true;
    return;
  }
  const r = state.result;
  const g = r.summary.groups;
  const [c0, c1] = groupColumns(hit.index);
  const rows = g.rows === 1 && state.info.rows > 1 ? `rows 0–${state.info.rows - 1}` : `row ${hit.row}`;
  showTip(tip, [
    `${rows} · columns ${c0}–${c1}`,
    `relative error ${fmt.percent(r.groupRelErr[hit.index])}`,
    `MSE ${fmt.sci(r.groupMse[hit.index])} · max ${fmt.sci(r.groupMaxErr[hit.index])}`,
  ], event);
}

function showTip(tip, lines, event) {
  tip.replaceChildren();
  for (const line of lines) {
    const div = document.createElement('div');
    div.textContent = line;
    tip.append(div);
  }
  tip.hidden = false;
  const wrap = $('error-map').getBoundingClientRect();
  const x = Math.min(event.offsetX + 14, wrap.width - tip.offsetWidth - 4);
  const y = event.offsetY + 14 + tip.offsetHeight > wrap.height ? event.offsetY - tip.offsetHeight - 8 : event.offsetY + 14;
  tip.style.left = `${Math.max(0, x)}px`;
  tip.style.top = `${y}px`;
}

function selectGroup(index) {
  if ($('map-metric').value === 'out') return;
  state.selectedGroup = index;
  map.setSelectedGroup(index);
  showHistogram(index);
}

async function showHistogram(index) {
  if (index === null || !state.result) return;
  try {
    drawHistogram(await bridge.request('histogram', { index, bins: HISTOGRAM_BINS }));
  } catch (err) {
    if (!(err instanceof Cancelled)) $('hist-caption').textContent = `No histogram: ${err.message}`;
  }
}

function drawHistogram(h) {
  histogram.setData(h);
  const rows = h.rows[1] - h.rows[0] > 1 ? `rows ${h.rows[0]}–${h.rows[1] - 1}` : `row ${h.rows[0]}`;
  const what = h.scaled ? 'Values × their column factors (what the grid saw)' : 'Values';
  $('hist-caption').textContent = `${what} of the group at ${rows}, columns ${h.cols[0]}–${h.cols[1] - 1}; the orange lines are its ${h.grid.length} grid levels${h.grid.length > COMB_ABOVE_LEVELS ? ' (a comb along the bottom: too many to draw across)' : ''}.`;
}

function selectColumn(col) {
  state.selectedColumn = col;
  map.setSelectedColumn(METRICS[$('map-metric').value].perRow ? null : col);
  profile.mark(col);
  const r = state.result;
  if (col === null || !r) {
    $('column-info').textContent = '';
    return;
  }
  const score = r.columnOutlierScore[col];
  $('column-info').textContent = `Column ${col}: max |w| ${fmt.sci(r.columnMaxAbs[col])}, error RMS ${fmt.sci(r.columnErrRms[col])}, ${score.toFixed(1)}× the median column's max |w|${score >= 4 ? ' — an outlier column' : ''}.`;
}

function showOutlierList(summary) {
  const list = $('outlier-list');
  list.replaceChildren();
  if (!summary.outlier_column_count) {
    list.textContent = 'No outlier columns: no input column reaches 4× the median column\'s max |w|.';
    return;
  }
  const shown = summary.outlier_columns.length;
  list.append(`${fmt.plural(summary.outlier_column_count, 'outlier column')}${shown < summary.outlier_column_count ? ` (the ${shown} largest shown)` : ''}: `);
  for (const c of summary.outlier_columns) {
    const b = document.createElement('button');
    b.type = 'button';
    b.className = 'chip';
    b.textContent = `${c.column}`;
    b.title = `${c.score.toFixed(1)}× the median column's max |w|`;
    b.addEventListener('click', () => selectColumn(c.column));
    list.append(b, ' ');
  }
}

/** A result's bits by part as a bar whose full width is `full` bits, and the parts listed. */
function drawBudget(summary, bar = $('budget'), legend = $('budget-legend'), full = summary.cost.total_bits) {
  const { cost } = summary;
  const parts = [
    ['codes (payload)', cost.payload_bits, '--part1'],
    [summary.recipe.format === 'codebook' ? 'codebook levels' : 'scales', cost.scale_bits, '--part2'],
    ['zero points', cost.zero_point_bits, '--part3'],
    [`kept in 16-bit (${fmt.count(cost.kept_values)} values and their indices)`, cost.kept_bits, '--accent'],
    ['per-column factors (free when folded into the previous layer)', cost.column_factor_bits, '--series2'],
  ].filter(([, bits], i) => i < 3 || bits > 0);
  bar.replaceChildren();
  legend.replaceChildren();
  for (const [name, bits, colour] of parts) {
    const share = cost.total_bits ? bits / cost.total_bits : 0;
    const seg = document.createElement('div');
    seg.style.width = `${full ? (100 * bits) / full : 0}%`;
    seg.style.background = `var(${colour})`;
    seg.title = `${name}: ${fmt.count(bits)} bits`;
    bar.append(seg);
    const li = document.createElement('li');
    const swatch = document.createElement('span');
    swatch.className = 'swatch';
    swatch.style.background = `var(${colour})`;
    li.append(swatch, `${name}: ${fmt.count(bits)} bits = ${(bits / cost.elements).toFixed(4)} bits per weight (${(100 * share).toFixed(1)} %)`);
    legend.append(li);
  }
  const total = document.createElement('li');
  total.textContent = `total: ${fmt.count(cost.total_bits)} bits = ${(cost.total_bits / cost.elements).toFixed(4)} bits per weight = ${fmt.bytes(cost.bytes)} for ${fmt.plural(cost.elements, 'weight')} in ${fmt.plural(cost.groups, 'group')}`;
  legend.append(total);
}

// ------------------------------------------------------------------ sweep

// `frontBy`: the error axis the rows' front was marked against (none for a cancelled sweep's);
// `skipped`: what a finished sweep skipped and why, in words (none while one runs or once cancelled).
const sweep = { rows: [], by: 'sqnr', frontBy: null, skipped: null, running: false, sortKey: 'bits_per_weight', ascending: true, shown: [] };
const sweepChart = new SeriesChart($('sweep-chart'), { xLabel: 'bits per weight', yLabel: 'error', onSelect: (i) => loadSweepRow(sweep.shown[i]) });
const SWEEP_FORMATS = ['int', 'nf4', 'e2m1', 'e4m3', 'mxfp4', 'mxint8', 'codebook'];
const SWEEP_COLOURS = ['--series1', '--part2', '--part3', '--series2', '--accent', '--muted', '--part1'];
/**
 * A running sweep redraws its chart at most this often (its status line follows every progress
 * message): a chart drawn with each message took a sixth of the pool workers' time on two cores.
 */
const SWEEP_DRAW_EVERY_MS = 1000;

const ticked = (name) => [...document.querySelectorAll(`input[name=${name}]:checked`)].map((el) => el.value);

function sweepError(row) {
  if (sweep.by === 'sqnr') return row.sqnr_db;
  if (sweep.by === 'output') return row.output_rel_err;
  return row.mse;
}

function drawSweep() {
  const rows = [...sweep.rows].sort((a, b) => a.bits_per_weight - b.bits_per_weight);
  sweep.shown = rows;
  const x = Float64Array.from(rows, (r) => r.bits_per_weight);
  const series = SWEEP_FORMATS.filter((f) => rows.some((r) => r.recipe.format === f)).map((f) => ({
    label: f,
    values: rows.map((r) => (r.recipe.format === f ? sweepError(r) : null)),
    colour: SWEEP_COLOURS[SWEEP_FORMATS.indexOf(f)],
    points: true,
  }));
  series.push({ label: 'front', values: rows.map((r) => (r.pareto ? sweepError(r) : null)), colour: '--text', spanGaps: true });
  sweepChart.yLabel = { sqnr: 'SQNR (dB)', mse: 'weight MSE', output: 'output error' }[sweep.by];
  sweepChart.logY = sweep.by !== 'sqnr';
  $('sweep-chart').hidden = rows.length === 0;
  if (rows.length) sweepChart.setData(x, series);
  // The error axis drawn, for whoever waits on a change of axis (its front comes from the worker).
  $('sweep-chart').dataset.by = sweep.by;
  drawSweepTable();
}

function drawSweepTable() {
  const front = sweep.rows.filter((r) => r.pareto);
  const key = sweep.sortKey;
  const value = (r) => (key === 'label' ? r.label : r[key] ?? Infinity);
  front.sort((a, b) => (value(a) < value(b) ? -1 : value(a) > value(b) ? 1 : 0) * (sweep.ascending ? 1 : -1));
  const body = $('sweep-rows');
  body.replaceChildren();
  for (const r of front) {
    const tr = document.createElement('tr');
    tr.tabIndex = 0;
    for (const cell of [r.label, r.bits_per_weight.toFixed(4), r.sqnr_db === null ? 'exact' : r.sqnr_db.toFixed(2), fmt.sci(r.mse), r.output_rel_err === null ? '–' : fmt.percent(r.output_rel_err)]) {
      const td = document.createElement('td');
      td.textContent = cell;
      tr.append(td);
    }
    tr.addEventListener('click', () => loadSweepRow(r));
    tr.addEventListener('keydown', (e) => { if (e.key === 'Enter') loadSweepRow(r); });
    body.append(tr);
  }
  $('sweep-table-wrap').hidden = front.length === 0;
}

function loadSweepRow(row) {
  if (!row) return;
  setRecipe({ ...readRecipe(), ...row.recipe });
  showDependentControls();
  analyze();
}

for (const button of document.querySelectorAll('th button[data-sort]')) {
  button.addEventListener('click', () => {
    sweep.ascending = sweep.sortKey === button.dataset.sort ? !sweep.ascending : true;
    sweep.sortKey = button.dataset.sort;
    drawSweepTable();
  });
}

/**
 * Mark the front of the rows on screen against the chosen error axis and draw them: each row
 * holds all three figures, so a new axis needs no run, and a sweep that ran against another axis
 * (changed while it ran) is brought in line when it ends.
 */
async function frontByAxis() {
  const by = $('sweep-by').value;
  if (by === 'output' && !state.calib) {
    $('sweep-status').textContent = 'The output error needs calibration data; choose SQNR or MSE, or add calibration.';
    return;
  }
  if (!sweep.rows.length || sweep.running) return;
  if (sweep.frontBy !== by) {
    try {
      sweep.rows = await bridge.request('sweepFront', { rows: sweep.rows, by });
      sweep.frontBy = by;
    } catch (err) {
      $('sweep-status').textContent = `The front could not be drawn against this axis: ${err.message}`;
      return;
    }
  }
  sweep.by = by;
  drawSweep();
  if (sweep.skipped !== null) showSweepDone();
}

/** The status of a sweep that ran to its end. */
function showSweepDone() {
  $('sweep-status').textContent = `${fmt.plural(sweep.rows.length, 'recipe')} run, ${sweep.rows.filter((r) => r.pareto).length} on the front, ${sweep.skipped}.`;
}

$('sweep-by').addEventListener('change', frontByAxis);

$('sweep-run').addEventListener('click', async () => {
  const spec = {
    formats: ticked('sweep-format'),
    bits: ticked('sweep-bits').map(Number),
    groups: ticked('sweep-group').map((g) => (g === 'row' ? 'row' : { group: Number(g) })),
    methods: ticked('sweep-method'),
    scale_dtypes: ticked('sweep-scale'),
    smooth: ticked('sweep-smooth').map((a) => (a === 'none' ? null : Number(a))),
    keep_fracs: ticked('sweep-keep').map(Number),
  };
  sweep.by = $('sweep-by').value;
  if (sweep.by === 'output' && !state.calib) {
    $('sweep-status').textContent = 'The output error needs calibration data; choose SQNR or MSE, or add calibration.';
    return;
  }
  sweep.rows = [];
  sweep.frontBy = null;
  sweep.skipped = null;
  sweep.running = true;
  let drawnAt = 0;
  try {
    const result = await task('Running the sweep', 'sweep', { spec, by: sweep.by }, null, (rows, done, total, elapsed) => {
      sweep.rows.push(...rows);
      const left = (elapsed / done) * (total - done) / 1000;
      $('sweep-status').textContent = `${done} of ${total} recipes done; about ${Math.ceil(left)} s left.`;
      if (elapsed - drawnAt >= SWEEP_DRAW_EVERY_MS) {
        drawnAt = elapsed;
        drawSweep();
      }
    });
    if (!result) {
      // The chart is drawn at most once a second while a sweep runs: show every row that came.
      drawSweep();
      $('sweep-status').textContent = `Cancelled after ${fmt.plural(sweep.rows.length, 'recipe')}.`;
      return;
    }
    timings.push({ what: 'sweep-compute', ms: bridge.lastComputeMs });
    sweep.rows = result.rows;
    sweep.frontBy = sweep.by;
    sweep.skipped = result.skipped;
    sweep.running = false;
    drawSweep();
    showSweepDone();
    restoreStatus();
    if ($('sweep-by').value !== sweep.by) await frontByAxis();
  } catch (err) {
    drawSweep();
    $('sweep-status').textContent = `The sweep could not run: ${err.message}`;
    restoreStatus();
  } finally {
    sweep.running = false;
  }
});

// ------------------------------------------------------------------ compare

const pins = { a: null, b: null };
const mapA = new ErrorMap($('map-a'));
const mapB = new ErrorMap($('map-b'));
const mapDiff = new ErrorMap($('map-diff'));

function pin(which) {
  if (!state.result) return;
  const s = state.result.summary;
  pins[which] = { summary: s, values: Float32Array.from(state.result.groupRelErr), tensor: tensorName(s) };
  showCompare();
}
$('pin-a').addEventListener('click', () => pin('a'));
$('pin-b').addEventListener('click', () => pin('b'));

/** A difference of two percentages, in percentage points (3.60 % − 2.10 % is 1.50 pp, not %). */
const percentagePoints = (x) => `${(100 * x).toPrecision(3)} pp`;

/** The tensor a result belongs to, as the compare card names it. */
function tensorName(summary) {
  return `${summary.tensor.name} (${fmt.shape(summary.tensor.shape)})`;
}

function showCompare() {
  const { a, b } = pins;
  const current = state.result ? tensorName(state.result.summary) : null;
  $('compare-hint').textContent = !a ? 'Pin the current result as A, change the recipe, then pin the new result as B.'
    : !b ? `A is ${a.summary.label}. Change the recipe, then pin the new result as B.`
      : a.tensor !== b.tensor ? 'A and B were pinned on different tensors; pin both on one tensor to compare them.'
        : a.tensor !== current ? `A and B are results on ${a.tensor}, not on the tensor open now; pin new ones to compare recipes on it.` : '';
  const ready = Boolean(a && b && a.tensor === b.tensor);
  $('compare-body').hidden = !ready;
  if (!ready) return;
  $('label-a').textContent = a.summary.label;
  $('label-b').textContent = b.summary.label;
  const figures = [
    ['bits per weight', (s) => s.bits_per_weight, (v) => v.toFixed(4)],
    ['size', (s) => s.bytes, (v) => fmt.bytes(Math.abs(v)), true],
    ['SQNR (dB)', (s) => s.sqnr_db, (v) => v.toFixed(2)],
    ['relative error', (s) => s.rel_fro_err, (v) => fmt.percent(v), false, percentagePoints],
    ['max error', (s) => s.max_abs_err, (v) => fmt.sci(v)],
    ['output error', (s) => s.output_rel_err, (v) => fmt.percent(v), false, percentagePoints],
  ];
  const body = $('compare-rows');
  body.replaceChildren();
  for (const [name, get, show, unsigned, showDiff = show] of figures) {
    const [va, vb] = [get(a.summary), get(b.summary)];
    if (va === null || vb === null || va === undefined || vb === undefined) continue;
    const diff = vb - va;
    const tr = document.createElement('tr');
    const sign = diff > 0 ? '+' : diff < 0 ? '−' : '';
    for (const text of [name, show(va), show(vb), `${sign}${unsigned ? showDiff(diff) : showDiff(Math.abs(diff))}`]) {
      const td = document.createElement('td');
      td.textContent = text;
      tr.append(td);
    }
    body.append(tr);
  }
  // Both maps on one colour scale; the difference only where the groups line up.
  const grid = (p) => p.summary.groups;
  let max = 0;
  let floor = Infinity;
  for (const v of [...a.values, ...b.values]) {
    if (v > max) max = v;
    if (v > 0 && v < floor) floor = v;
  }
  const range = { max, floor: max > 0 ? Math.max(floor, max * 1e-6) : 0 };
  const cols = state.info.cols;
  const data = (p, values, extra = {}) => ({ rows: grid(p).rows, perRow: grid(p).per_row, cols, groupSize: grid(p).group_size, values, log: true, range, ...extra });
  mapA.setData(data(a, a.values));
  mapB.setData(data(b, b.values));
  const { lo, hi } = mapA.range();
  const shared = { lo: fmt.sci(lo), hi: fmt.sci(hi), label: `${METRICS.rel.label}, log scale, one scale for A and B`, colours: STOP_COLOURS };
  showPicture('map-a', `A: ${a.summary.label}`, shared);
  showPicture('map-b', `B: ${b.summary.label}`, shared);
  const aligned = grid(a).rows === grid(b).rows && grid(a).per_row === grid(b).per_row;
  $('diff-figure').hidden = !aligned;
  if (aligned) {
    mapDiff.setData(data(b, b.values.map((v, i) => v - a.values[i]), { diverging: true, range: null, log: false }));
    // Linear and centred on no change: the ends are the largest difference either way.
    const most = mapDiff.range().hi;
    showPicture('map-diff', `B − A: ${b.summary.label} against ${a.summary.label}`, {
      lo: most > 0 ? `−${fmt.sci(most)}` : '0',
      hi: most > 0 ? `+${fmt.sci(most)}` : '0',
      label: 'B − A of each group\'s relative error, linear: blue where B is lower, grey equal, red higher',
      colours: DIVERGING_COLOURS,
    });
  }
  $('compare-maps-note').textContent = aligned ? '' : 'The two recipes group the weights differently, so there is no cell-by-cell difference.';
  // One scale for both bars, so that the cheaper recipe's bar is the shorter one.
  const full = Math.max(a.summary.cost.total_bits, b.summary.cost.total_bits);
  drawBudget(a.summary, $('budget-a'), $('budget-a-legend'), full);
  drawBudget(b.summary, $('budget-b'), $('budget-b-legend'), full);
  $('compare-budget-scale').textContent = `Both bars on one scale: the full width is ${(full / a.summary.cost.elements).toFixed(4)} bits per weight; the colours are the parts listed under each bar.`;
}

// ------------------------------------------------------------------ model size

let shardFiles = [];
$('size-files').addEventListener('change', (e) => {
  shardFiles = [...e.target.files];
  e.target.value = '';
  computeModelSize();
});
$('size-run').addEventListener('click', () => computeModelSize());

async function computeModelSize() {
  // The parameter count stands in for shards only when none are open.
  const fields = [['size-budget', 'memory budget'], ...(shardFiles.length ? [] : [['size-params', 'parameter count']])];
  for (const [id, what] of fields) {
    const field = $(id);
    if (field.value === '' || !(Number(field.value) >= 0)) {
      $('size-figures').textContent = `No size: the ${what} must be a number, 0 or more (${field.value === '' ? 'it is empty or not a number' : `it reads ${field.value}`}).`;
      $('size-bar').hidden = true;
      return;
    }
  }
  try {
    const size = await bridge.request('modelSize', {
      files: shardFiles,
      pattern: $('size-pattern').value || '*',
      include1d: $('size-1d').checked,
      params: Number($('size-params').value) * 1e9,
      recipe: await readyRecipe(),
    });
    const budget = Number($('size-budget').value) * 1e9;
    const scale = Math.max(budget, size.total_bytes) || 1;
    const bar = $('size-bar');
    bar.hidden = false;
    bar.replaceChildren();
    for (const [bytes, colour, title] of [[size.quantized_bytes, '--part1', 'quantized'], [size.other_bytes, '--part2', 'kept as stored']]) {
      const seg = document.createElement('div');
      seg.style.width = `${(100 * bytes) / scale}%`;
      seg.style.background = `var(${colour})`;
      seg.title = `${title}: ${fmt.decimalBytes(bytes)}`;
      bar.append(seg);
    }
    const source = shardFiles.length ? `${fmt.plural(shardFiles.length, 'shard')}` : `${$('size-params').value} billion parameters (as 4096-wide bf16 rows)`;
    const fits = size.total_bytes <= budget ? `fits in ${fmt.decimalBytes(budget)} with ${fmt.decimalBytes(budget - size.total_bytes)} to spare` : `exceeds ${fmt.decimalBytes(budget)} by ${fmt.decimalBytes(size.total_bytes - budget)}`;
    $('size-figures').textContent = `${source}: ${fmt.plural(size.quantized_tensors, 'tensor')} quantized (${fmt.count(size.quantized_params)} weights, ${fmt.decimalBytes(size.quantized_source_bytes)} → ${fmt.decimalBytes(size.quantized_bytes)}), ${fmt.plural(size.other_tensors, 'tensor')} kept as stored (${fmt.decimalBytes(size.other_bytes)}); total ${fmt.decimalBytes(size.total_bytes)}, which ${fits}.`;
  } catch (err) {
    $('size-figures').textContent = `No size: ${err.message}`;
  }
}

// ------------------------------------------------------------------ exports

function download(name, data, type) {
  const url = URL.createObjectURL(new Blob([data], { type }));
  const a = document.createElement('a');
  a.href = url;
  a.download = name;
  document.body.append(a);
  a.click();
  a.remove();
  setTimeout(() => URL.revokeObjectURL(url), 10_000);
}

function baseName() {
  const name = state.result?.summary.tensor.name || 'tensor';
  return name.replace(/[^\w.-]+/g, '_');
}

const EXPORTS = {
  'download-report': ['reportJson', '.report.json', 'application/json'],
  'download-npy': ['dequantizedNpy', '.dequantized.npy', 'application/octet-stream'],
  'download-markdown': ['markdown', '.summary.md', 'text/markdown'],
  'download-groups': ['groupsCsv', '.groups.csv', 'text/csv'],
  'download-packed': ['packed', '.packed.safetensors', 'application/octet-stream'],
};
for (const [id, [type, suffix, mime]] of Object.entries(EXPORTS)) {
  $(id).addEventListener('click', async () => {
    try {
      download(`${baseName()}${suffix}`, await bridge.request(type), mime);
      $('export-message').textContent = '';
    } catch (err) {
      $('export-message').textContent = `Nothing was saved: ${err.message}`;
    }
  });
}

// ------------------------------------------------------------------ chart files

/**
 * PNG and SVG buttons under each chart. A chart's PNG is its canvas; an error map's PNG is its SVG
 * file drawn, since the map's canvas alone has neither its title nor its colour scale.
 */
function chartExports() {
  const picture = (id, name) => [id, name, () => $(id), () => pictureSvg(state.pictures[id].title, $(id), state.pictures[id].legend), true];
  const charts = [
    picture('error-map', 'error map'),
    ['column-profile', 'column profile', () => profile.chart?.ctx.canvas, () => seriesSvg('Input columns', profile.last.x, profile.last.series, { xLabel: 'input column', yLabel: profile.yLabel, rightLabel: profile.rightLabel, logY: true })],
    ['histogram', 'group histogram', () => histogram.chart?.ctx.canvas, () => {
      const { histogram: h, grid } = histogram.last;
      const width = (h.hi - h.lo) / h.counts.length || 1;
      const x = Float64Array.from(h.counts, (_, i) => h.lo + (i + 0.5) * width);
      // The caption's first part names the group; the rest describes the drawing on screen.
      const title = $('hist-caption').textContent.split(';')[0];
      return seriesSvg(title, x, [{ label: 'count', values: Float64Array.from(h.counts), colour: '--series1', bars: true }], { xLabel: 'weight value', yLabel: `count (${grid.length} grid levels)`, marks: Array.from(grid), markReach: levelReach(grid.length) });
    }],
    ['sweep-chart', 'sweep', () => sweepChart.chart?.ctx.canvas, () => seriesSvg('Sweep: bits per weight against error', sweepChart.last.x, sweepChart.last.series, { xLabel: 'bits per weight', yLabel: sweepChart.yLabel, logY: sweepChart.logY })],
    ['method-curve', 'method curve', () => methodCurve.chart?.ctx.canvas, () => seriesSvg('Output error across α', methodCurve.last.x, methodCurve.last.series, { xLabel: 'α', yLabel: 'output error' })],
    ['smooth-curve', 'W8A8 curve', () => smoothCurve.chart?.ctx.canvas, () => seriesSvg('W8A8 output error across α', smoothCurve.last.x, smoothCurve.last.series, { xLabel: 'α', yLabel: 'output error', logY: true })],
    ['smooth-columns', 'smoothing ranges', () => smoothColumns.chart?.ctx.canvas, () => seriesSvg('Column ranges before and after smoothing', smoothColumns.last.x, smoothColumns.last.series, { xLabel: 'input column', yLabel: 'max |value|', logY: true })],
    picture('map-a', 'A error map'),
    picture('map-b', 'B error map'),
    picture('map-diff', 'difference map'),
  ];
  for (const [id, name, canvas, svg, framed = false] of charts) {
    const row = document.createElement('div');
    row.className = 'chart-files';
    // Said beside the buttons, where the eye is, not in the export card far below.
    const note = document.createElement('span');
    note.className = 'hint';
    note.setAttribute('role', 'status');
    for (const kind of ['PNG', 'SVG']) {
      const button = document.createElement('button');
      button.type = 'button';
      button.textContent = kind;
      button.dataset.chart = id;
      button.setAttribute('aria-label', `download the ${name} as ${kind}`);
      button.addEventListener('click', () => {
        const file = `${baseName()}.${id}.${kind.toLowerCase()}`;
        const source = canvas();
        if (!source || source.closest('[hidden]')) {
          note.textContent = `Nothing to save yet: the ${name} has not been drawn.`;
          return;
        }
        note.textContent = '';
        if (kind === 'SVG') download(file, svg(), 'image/svg+xml');
        else if (framed) pngOf(svg()).then((blob) => download(file, blob, 'image/png'), (err) => { note.textContent = `Nothing was saved: ${err.message}`; });
        else source.toBlob((blob) => blob && download(file, blob, 'image/png'));
      });
      row.append(button);
    }
    row.prepend(note);
    // Under the map's colour scale, which belongs right under the map.
    (document.querySelector(`.legend[data-for="${id}"]`) ?? $(id)).after(row);
  }
}
chartExports();

// ------------------------------------------------------------------ links

/** The recipe and the view in the URL fragment (never the data), so a colleague with the same
 * file gets the same screen. */
function writeLink() {
  const params = new URLSearchParams({ recipe: JSON.stringify(readRecipe()), map: $('map-metric').value });
  history.replaceState(null, '', `#${params}`);
}

/** The core reads and checks the link's recipe as it would check an analysis, so a link never
 * puts half a recipe, or one the page cannot run, on screen. */
async function readLink() {
  const params = new URLSearchParams(location.hash.slice(1));
  const map = params.get('map');
  if (map && METRICS[map]) $('map-metric').value = map;
  const recipe = params.get('recipe');
  if (!recipe) return;
  try {
    setRecipe(await bridge.request('recipeFromLink', { text: recipe }));
    showDependentControls();
  } catch (err) {
    showMessage('recipe-message', `The link's recipe was not applied (${err.message}); the defaults are shown.`);
  }
}

$('copy-link').addEventListener('click', async () => {
  writeLink();
  try {
    await navigator.clipboard.writeText(location.href);
    $('export-message').textContent = 'Link copied. It holds the recipe and the view, not your data.';
  } catch {
    $('export-message').textContent = `Link: ${location.href}`;
  }
});

// ------------------------------------------------------------------ start

async function start() {
  try {
    const { defaults } = await bridge.start();
    state.defaults = defaults;
    buildControls(defaults);
    await readLink();
    document.body.dataset.ready = 'true';
    // In the background: a request made meanwhile waits for it (tens of milliseconds), and a
    // failure here would show again, and be reported, with the user's own request.
    bridge.request('warmUp').catch(() => {});
  } catch (err) {
    $('status').textContent = `The page could not start its compute worker: ${err.message}`;
  }
  if ('serviceWorker' in navigator && location.protocol.startsWith('http') && !config.noServiceWorker) {
    navigator.serviceWorker.register('sw.js').catch(() => {});
  }
}

pageReady = start();
