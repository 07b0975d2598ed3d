// Shared set-up of the browser tests: Debian's Chromium driven by playwright-core, the page
// served by `cargo xtask test`, screenshots into the folder the test command prints.
import { chromium } from 'playwright-core';
import assert from 'node:assert/strict';
import { readFileSync } from 'node:fs';
import path from 'node:path';
import { fileURLToPath } from 'node:url';

export const URL_UNDER_TEST = process.env.BITLOUPE_URL || 'http://127.0.0.1:8080/';
const SHOTS = process.env.BITLOUPE_SCREENSHOTS || 'test-output/screenshots';
const HERE = path.dirname(fileURLToPath(import.meta.url));

export const CHROMIUM_FLAGS = [
  '--headless', '--no-sandbox', '--disable-gpu', '--no-first-run', '--disable-background-networking',
  '--disable-component-update', '--disable-sync',
];

export async function launch() {
  return chromium.launch({ executablePath: process.env.BITLOUPE_CHROMIUM || '/usr/bin/chromium', args: CHROMIUM_FLAGS });
}

/** A fresh page that records every request it makes and every error it throws. */
export async function openPage(browser, { viewport = { width: 1400, height: 1000 }, colorScheme = 'light', query = '' } = {}) {
  const context = await browser.newContext({ viewport, colorScheme });
  const page = await context.newPage();
  const requests = [];
  const errors = [];
  context.on('request', (r) => requests.push(r.url()));
  page.on('pageerror', (e) => errors.push(e.message));
  await page.goto(URL_UNDER_TEST + query);
  await page.waitForSelector('body[data-ready=true]', { timeout: 30_000 });
  return { context, page, requests, errors };
}

export function fixture(name) {
  return readFileSync(path.join(HERE, '..', '..', 'fixtures', name));
}

export async function shot(page, name) {
  await page.screenshot({ path: path.join(SHOTS, `${name}.png`), fullPage: true });
}

/** Drop a file on the page (or on the element `target` selects) as a user's drag and drop does. */
export async function dropFile(page, name, bytes, target = null) {
  await page.evaluate(({ name, data, target }) => {
    const file = new File([Uint8Array.from(data)], name);
    const transfer = new DataTransfer();
    transfer.items.add(file);
    const on = target ? document.querySelector(target) : window;
    on.dispatchEvent(new DragEvent('drop', { dataTransfer: transfer, bubbles: true, cancelable: true }));
  }, { name, data: [...bytes], target });
}

/** Results drawn in each page as of the last `waitForAnalysis` that returned there. */
const drawnSeen = new WeakMap();

/** Results the page has drawn so far (it records each once painted). */
function drawnResults(page) {
  // A frame first, so that a result whose status line is already up has been counted too.
  return page.evaluate(() => new Promise((resolve) => requestAnimationFrame(() => {
    resolve(window.bitloupeTimings.filter((t) => t.what === 'open-to-drawn' || t.what === 'recipe-to-drawn').length);
  })));
}

/**
 * Wait until the status line reports a finished analysis: one whose status differs from
 * `before`, or a result drawn since the last wait returned (a tiny tensor's next result can have
 * the same label and the same milliseconds, so the same status line).
 */
export async function waitForAnalysis(page, before = '') {
  await page.waitForFunction(([prev, seen]) => {
    const s = document.getElementById('status').textContent;
    const drawn = window.bitloupeTimings.filter((t) => t.what === 'open-to-drawn' || t.what === 'recipe-to-drawn').length;
    return s.includes('analysed in') && (s !== prev || (seen !== null && drawn > seen));
  }, [before, drawnSeen.get(page) ?? null], { timeout: 60_000 });
  drawnSeen.set(page, await drawnResults(page));
  return page.textContent('#status');
}

export function sameOrigin(url) {
  const origin = new URL(URL_UNDER_TEST).origin;
  return url.startsWith('data:') || url.startsWith('blob:') || new URL(url).origin === origin;
}

/** A little-endian float32 `.npy` file of `rows` × `cols` (layout from numpy's NPY format
 * documentation, version 1.0), with `valueAt(i)` as its i-th element in C order. */
export function npyF32(rows, cols, valueAt) {
  const header = `{'descr': '<f4', 'fortran_order': False, 'shape': (${rows}, ${cols}), }`;
  const padded = header + ' '.repeat(63 - ((10 + header.length) % 64)) + '\n';
  const preamble = Buffer.alloc(10);
  preamble.write('\x93NUMPY', 0, 'latin1');
  preamble[6] = 1;
  preamble.writeUInt16LE(padded.length, 8);
  const data = new Float32Array(rows * cols);
  for (let i = 0; i < data.length; i++) data[i] = valueAt(i);
  return Buffer.concat([preamble, Buffer.from(padded, 'latin1'), Buffer.from(data.buffer)]);
}

/** Everything the page shows of its tensor, calibration, recipe and results: the same before
 * and after a failure means the failure lost nothing on screen. */
export async function pageState(page) {
  return page.evaluate(() => {
    const el = (id) => document.getElementById(id);
    const control = (id) => (el(id).type === 'checkbox' ? el(id).checked : el(id).value);
    const recipeControls = ['format', 'bits', 'granularity', 'symmetric', 'scale-dtype', 'method', 'double-quant', 'damp', 'act-order', 'awq-clip', 'keep', 'smooth-on'];
    const figures = ['fig-bpw', 'fig-size', 'fig-sqnr', 'fig-rel', 'fig-max', 'fig-output', 'method-figures', 'hist-caption', 'map-caption'];
    return {
      tensor: el('tensor-info').textContent,
      calibration: el('calib-info').textContent,
      outputErrorShown: !el('fig-output-card').hidden,
      recipe: Object.fromEntries(recipeControls.map((id) => [id, control(id)])),
      figures: Object.fromEntries(figures.map((id) => [id, el(id).textContent])),
      link: location.hash,
    };
  });
}

/** The file a click on `selector` downloads: its suggested name and its bytes. */
export async function downloadOf(page, selector) {
  const [download] = await Promise.all([page.waitForEvent('download'), page.click(selector)]);
  const chunks = [];
  for await (const chunk of await download.createReadStream()) chunks.push(chunk);
  return { name: download.suggestedFilename(), bytes: Buffer.concat(chunks) };
}

/** The bytes of the file a click on `selector` downloads. */
export async function downloaded(page, selector) {
  return (await downloadOf(page, selector)).bytes;
}

/** The downloaded JSON report, parsed. */
export async function downloadReport(page) {
  return JSON.parse((await downloaded(page, '#download-report')).toString());
}

/** The identity and figures of the downloaded JSON report: what the compute worker holds. */
export async function reportFigures(page) {
  const report = await downloadReport(page);
  const { tensor, label, recipe, bits_per_weight, sqnr_db, mse, output_rel_err } = report;
  return { tensor, label, recipe, bits_per_weight, sqnr_db, mse, output_rel_err };
}

/**
 * After a failure: the screen shows exactly what `before` recorded (see `pageState`), the worker
 * still holds the analysis behind it (its report matches `reportBefore`), and a further recipe
 * change runs on the same tensor: choosing `bits` shows a result whose label starts `label`.
 */
export async function assertNothingLost(page, before, reportBefore, { bits, label }) {
  assert.deepEqual(await pageState(page), before, 'tensor, calibration, recipe and results on screen are unchanged');
  assert.deepEqual(await reportFigures(page), reportBefore, 'the worker still holds the analysis on screen');
  const status = await page.textContent('#status');
  await page.selectOption('#bits', String(bits));
  const shown = await waitForAnalysis(page, status);
  assert.ok(shown.startsWith(label), `after the failure, bits ${bits} show "${shown}", not "${label}…"`);
}
