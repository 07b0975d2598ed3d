// The page: controls, drawing and the flow between them. All computation happens in the worker
// behind the bridge; this thread only draws, so the page stays responsive.

import { CoreBridge, Cancelled } from './bridge.js';
import { ErrorMap } from './errormap.js';
import { ColumnProfile, GroupHistogram } from './charts.js';
import { GRADIENT } from './colors.js';
import * as fmt from './format.js';

const $ = (id) => document.getElementById(id);
const TEXT_FILE = /\.(txt|csv|tsv)$/i;
const GROUP_CHOICES = [8, 16, 32, 64, 128, 256, 512, 1024, 2048, 4096];
const SHOW_PROGRESS_AFTER_MS = 150;
const HISTOGRAM_BINS = 64;

/** Timings of finished steps, read by the in-browser benchmark (bench/page.mjs). */
const timings = (window.bitloupeTimings = []);

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
};

// ------------------------------------------------------------------ worker bridge

const config = window.BITLOUPE_CONFIG || {};
const bridge = new CoreBridge(config.makeWorker || (() => new Worker('worker.js')), config.wasm || 'pkg/bitloupe_bg.wasm');
bridge.onRestart = (reason) => {
  if (!(reason instanceof Cancelled)) showMessage('input-message', reason.message);
};

let busyTimer = null;
let running = 0;

/** Run one request with the progress bar and cancel button; returns null when cancelled. */
async function task(label, type, payload, remember) {
  running += 1;
  $('status').textContent = `${label}…`;
  const progress = $('progress');
  progress.removeAttribute('value');
  clearTimeout(busyTimer);
  busyTimer = setTimeout(() => { $('busy').hidden = false; }, SHOW_PROGRESS_AFTER_MS);
  const started = performance.now();
  try {
    const result = await bridge.request(type, payload, {
      remember,
      onProgress: (done, total) => { progress.max = total; progress.value = done; },
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
  granularity.add(new Option('each row (output channel)', 'row'));
  for (const g of GROUP_CHOICES.filter((g) => g >= defaults.group_sizes[0] && g <= defaults.group_sizes[1])) {
    granularity.add(new Option(`groups of ${g}`, `${g}`));
  }
  setRecipe(defaults.recipe);
  for (const id of ['bits', 'granularity', 'symmetric', 'scale-dtype']) $(id).addEventListener('change', () => analyze());
}

function readRecipe() {
  const g = $('granularity').value;
  return {
    bits: Number($('bits').value),
    granularity: g === 'tensor' || g === 'row' ? g : { group: Number(g) },
    symmetric: $('symmetric').value === 'true',
    scale_dtype: $('scale-dtype').value,
  };
}

function setRecipe(recipe) {
  $('bits').value = String(recipe.bits);
  $('granularity').value = typeof recipe.granularity === 'string' ? recipe.granularity : String(recipe.granularity.group);
  $('symmetric').value = String(recipe.symmetric);
  $('scale-dtype').value = recipe.scale_dtype;
}

// ------------------------------------------------------------------ opening tensors

async function open(label, type, payload) {
  showMessage('input-message', '');
  const started = performance.now();
  try {
    const result = await task(label, type, { ...payload, recipe: readRecipe() }, 'open');
    if (!result) return;
    state.info = result.info;
    showInfo(result.info);
    if (result.recipeError) {
      showRecipeError(result.recipeError);
    } else {
      showResults(result, { fresh: true });
      recordTiming('open-to-drawn', started);
    }
  } catch (err) {
    showMessage('input-message', `Could not open it: ${err.message}. The tensor you had stays open.`);
    restoreStatus();
  }
}

async function openFile(file) {
  showMessage('input-message', '');
  if (TEXT_FILE.test(file.name)) {
    const text = await file.text();
    $('paste').value = text;
    return open(`Reading ${file.name}`, 'openText', { text });
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
      return open(`Reading ${file.name}`, 'openFile', { file, name: null, bf16 });
    }
    showListing(file, listing);
    $('status').textContent = `${listing.entries.length} tensors in ${file.name}: choose one.`;
    recordTiming('list', started);
  } catch (err) {
    showMessage('input-message', `Could not open ${file.name}: ${err.message}. The tensor you had stays open.`);
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
      open(`Reading ${entry.name}`, 'openFile', { file: state.file, name: entry.name, bf16: $('bf16').checked });
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
    open('Generating the demo tensor', 'openDemo', {});
  });
}
$('use-paste').addEventListener('click', () => {
  $('tensor-list').hidden = true;
  open('Reading the pasted matrix', 'openText', { text: $('paste').value });
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
    const result = await task('Quantizing', 'analyze', { recipe: readRecipe() }, 'analyze');
    if (result) {
      showResults(result, { fresh: false });
      recordTiming('recipe-to-drawn', started);
    }
  } catch (err) {
    showRecipeError(err.message);
  } finally {
    analysing = false;
    if (again) {
      again = false;
      analyze();
    }
  }
}

function showRecipeError(message) {
  showMessage('recipe-message', `${message}. The results below are from the last recipe that worked.`);
  $('status').textContent = 'This recipe cannot be applied to this tensor.';
}

const map = new ErrorMap($('error-map'), { onHover: hoverGroup, onSelect: selectGroup });
const profile = new ColumnProfile($('column-profile'), { onSelect: selectColumn });
const histogram = new GroupHistogram($('histogram'));

function showResults(result, { fresh }) {
  state.result = result;
  const s = result.summary;
  $('empty').hidden = true;
  $('report').hidden = false;
  showMessage('recipe-message', '');
  state.statusText = `${s.label} on ${s.tensor.name || 'the tensor'} · analysed in ${Math.round(result.elapsedMs)} ms`;
  $('status').textContent = state.statusText;

  $('fig-bpw').textContent = s.bits_per_weight.toFixed(4);
  $('fig-bpw-sub').textContent = `${s.recipe.bits}-bit codes + scales${s.recipe.symmetric ? '' : ' + zero points'}`;
  $('fig-size').textContent = fmt.bytes(s.bytes);
  $('fig-size-sub').textContent = `${s.cost.ratio_to_source.toFixed(2)}× smaller than ${s.tensor.dtype} · ${s.cost.ratio_to_16bit.toFixed(2)}× smaller than 16-bit`;
  $('fig-sqnr').textContent = s.exact ? 'exact' : `${s.sqnr_db.toFixed(2)} dB`;
  $('fig-rel').textContent = fmt.percent(s.rel_fro_err);
  $('fig-max').textContent = fmt.sci(s.max_abs_err);

  drawMap(!fresh);
  const outlier = Uint8Array.from(result.columnOutlierScore, (v) => (v >= 4 ? 1 : 0));
  profile.setData({ maxAbs: result.columnMaxAbs, errRms: result.columnErrRms, outlier });
  showOutlierList(s);
  drawBudget(s.cost);
  $('caution').textContent = s.caution;

  const groups = result.groupMse.length;
  if (fresh || state.selectedGroup === null || state.selectedGroup >= groups) {
    state.selectedGroup = worstGroup(result.groupMse);
    state.selectedColumn = s.outlier_columns.length ? s.outlier_columns[0].column : null;
  }
  map.setSelectedGroup(state.selectedGroup);
  selectColumn(state.selectedColumn);
  showHistogram(state.selectedGroup);
}

function worstGroup(values) {
  let best = 0;
  for (let i = 1; i < values.length; i++) if (values[i] > values[best]) best = i;
  return best;
}

const METRICS = {
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
  map.setData({ rows: g.rows, perRow: g.per_row, cols, groupSize: g.group_size, values: result[metric.key], log: metric.log }, { keepView });
  const what = g.group_size ? `groups of ${g.group_size} along each row` : g.rows === 1 ? 'the whole tensor as one group' : 'one group per row';
  $('map-caption').textContent = `${fmt.plural(g.rows, 'row')} × ${fmt.plural(g.per_row, 'cell')} (${what}); colour: ${metric.label}, log scale. Scroll or press + and − to zoom, drag to pan, click a cell for its histogram.`;
  const { lo, hi } = map.range();
  $('legend-lo').textContent = fmt.sci(lo);
  $('legend-hi').textContent = fmt.sci(hi);
  $('legend-ramp').style.background = GRADIENT;
}

$('map-metric').addEventListener('change', () => drawMap(true));
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
  if (!hit || !state.result) {
    tip.hidden = true;
    return;
  }
  const r = state.result;
  const g = r.summary.groups;
  const [c0, c1] = groupColumns(hit.index);
  const rows = g.rows === 1 && state.info.rows > 1 ? `rows 0–${state.info.rows - 1}` : `row ${hit.row}`;
  tip.innerHTML = '';
  const lines = [
    `${rows} · columns ${c0}–${c1}`,
    `relative error ${fmt.percent(r.groupRelErr[hit.index])}`,
    `MSE ${fmt.sci(r.groupMse[hit.index])} · max ${fmt.sci(r.groupMaxErr[hit.index])}`,
  ];
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
  state.selectedGroup = index;
  map.setSelectedGroup(index);
  showHistogram(index);
}

async function showHistogram(index) {
  if (index === null || !state.result) return;
  try {
    const h = await bridge.request('histogram', { index, bins: HISTOGRAM_BINS });
    histogram.setData(h);
    const rows = h.rows[1] - h.rows[0] > 1 ? `rows ${h.rows[0]}–${h.rows[1] - 1}` : `row ${h.rows[0]}`;
    $('hist-caption').textContent = `Values of the group at ${rows}, columns ${h.cols[0]}–${h.cols[1] - 1}; vertical lines are its ${h.grid.length} grid levels.`;
  } catch (err) {
    if (!(err instanceof Cancelled)) $('hist-caption').textContent = `No histogram: ${err.message}`;
  }
}

function selectColumn(col) {
  state.selectedColumn = col;
  map.setSelectedColumn(col);
  profile.select(col);
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

function drawBudget(cost) {
  const parts = [
    ['codes (payload)', cost.payload_bits, '--part1'],
    ['scales', cost.scale_bits, '--part2'],
    ['zero points', cost.zero_point_bits, '--part3'],
  ];
  const bar = $('budget');
  const legend = $('budget-legend');
  bar.replaceChildren();
  legend.replaceChildren();
  for (const [name, bits, colour] of parts) {
    const share = cost.total_bits ? bits / cost.total_bits : 0;
    const seg = document.createElement('div');
    seg.style.width = `${100 * share}%`;
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
  total.textContent = `total: ${fmt.count(cost.total_bits)} bits = ${fmt.bytes(cost.bytes)} for ${fmt.plural(cost.elements, 'weight')} in ${fmt.plural(cost.groups, 'group')}`;
  legend.append(total);
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

$('download-report').addEventListener('click', async () => {
  const json = await bridge.request('reportJson');
  download(`${baseName()}.report.json`, json, 'application/json');
});
$('download-npy').addEventListener('click', async () => {
  const bytes = await bridge.request('dequantizedNpy');
  download(`${baseName()}.dequantized.npy`, bytes, 'application/octet-stream');
});

// ------------------------------------------------------------------ start

async function start() {
  try {
    const { defaults } = await bridge.start();
    state.defaults = defaults;
    buildControls(defaults);
    document.body.dataset.ready = 'true';
  } catch (err) {
    $('status').textContent = `The page could not start its compute worker: ${err.message}`;
  }
  if ('serviceWorker' in navigator && location.protocol.startsWith('http') && !config.noServiceWorker) {
    navigator.serviceWorker.register('sw.js').catch(() => {});
  }
}

start();
