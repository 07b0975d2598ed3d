// End-to-end tests of the page in headless Chromium.
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import { pathToFileURL } from 'node:url';
import { openSync, readSync, writeSync, ftruncateSync, closeSync, mkdtempSync } from 'node:fs';
import os from 'node:os';
import path from 'node:path';
import { launch, openPage, fixture, shot, dropFile, waitForAnalysis, sameOrigin, pageState, reportFigures, assertNothingLost, npyF32, downloadOf, downloaded, URL_UNDER_TEST } from './harness.mjs';

let browser;
before(async () => { browser = await launch(); });
after(async () => { await browser?.close(); });

/** A PNG file's width and height (its IHDR chunk, after the 8-byte signature: PNG specification). */
const pngSize = (png) => [png.readUInt32BE(16), png.readUInt32BE(20)];

/** The ends and colours of the colour scale drawn under the map `id`. */
function legendOf(page, id) {
  return page.evaluate((id) => {
    const el = document.querySelector(`.legend[data-for="${id}"]`);
    return { lo: el.querySelector('.lo').textContent, hi: el.querySelector('.hi').textContent, ramp: el.querySelector('.ramp').style.background };
  }, id);
}

async function withDemo() {
  const session = await openPage(browser);
  await session.page.click('#load-demo-big');
  await waitForAnalysis(session.page);
  return session;
}

test('the empty page invites a first step and loads the demo tensor', async () => {
  const { page, requests, errors, context } = await openPage(browser);
  assert.match(await page.textContent('#status'), /demo tensor or drop a file/);
  await shot(page, '01-empty');
  await page.click('#load-demo-big');
  const status = await waitForAnalysis(page);
  assert.match(status, /int4 asym g128 f16 on demo/);
  // Source: 4 + (16 + 4)/128 bits per weight (foundation issue's worked example).
  assert.equal(await page.textContent('#fig-bpw'), '4.1563');
  assert.match(await page.textContent('#fig-sqnr'), /dB$/);
  assert.match(await page.textContent('#caution'), /proxy/);
  assert.match(await page.textContent('#column-info'), /outlier column/);
  assert.match(await page.textContent('#hist-caption'), /16 grid levels/);
  await shot(page, '02-demo');
  assert.deepEqual(errors, []);
  assert.deepEqual(requests.filter((u) => !sameOrigin(u)), [], 'no request left the page origin');
  await context.close();
});

test('a click while the page is still starting waits for its controls', async () => {
  const context = await browser.newContext({ viewport: { width: 1400, height: 1000 } });
  const page = await context.newPage();
  // The compute worker answers late, as on a slow machine: the page's buttons work before its
  // recipe controls are built from the core's defaults.
  await page.addInitScript(() => {
    const Real = window.Worker;
    window.Worker = class extends Real {
      constructor(...args) {
        super(...args);
        window.workerMade = true;
      }

      postMessage(...args) {
        setTimeout(() => super.postMessage(...args), 800);
      }
    };
  });
  await page.goto(URL_UNDER_TEST);
  await page.waitForFunction(() => window.workerMade === true);
  assert.notEqual(await page.getAttribute('body', 'data-ready'), 'true');
  await page.click('#load-demo');
  const status = await waitForAnalysis(page);
  assert.match(status, /int4 asym g128 f16 on demo/);
  assert.equal(await page.isVisible('#recipe-message'), false);
  await context.close();
});

test('changing the recipe re-runs the analysis and changes the figures', async () => {
  const { page, context } = await withDemo();
  const sqnr4 = await page.textContent('#fig-sqnr');
  const before = await page.textContent('#status');
  await page.selectOption('#bits', '2');
  await waitForAnalysis(page, before);
  assert.notEqual(await page.textContent('#fig-sqnr'), sqnr4);
  assert.equal(await page.textContent('#fig-bpw'), '2.1406', '2 + (16 + 2)/128');
  const before2 = await page.textContent('#status');
  await page.selectOption('#granularity', 'row');
  await page.selectOption('#symmetric', 'true');
  await waitForAnalysis(page, before2);
  await page.waitForFunction(() => document.getElementById('status').textContent.includes('sym per-row'));
  assert.match(await page.textContent('#map-caption'), /one group per row/);
  await page.selectOption('#map-metric', 'mse');
  await shot(page, '03-recipe-changed');
  await context.close();
});

test('a count of kept columns that is not a whole number of at least 1 is refused and put back', async () => {
  const { page, context } = await withDemo();
  const before = await page.textContent('#status');
  await page.selectOption('#keep', 'cols');
  await waitForAnalysis(page, before);
  const kept = await page.textContent('#status');
  assert.match(kept, /keep 8 col/);
  for (const typed of ['0', '2.5', '-3']) {
    await page.fill('#keep-cols', typed);
    await page.press('#keep-cols', 'Enter');
    await page.waitForFunction(() => !document.getElementById('recipe-message').hidden);
    assert.match(await page.textContent('#recipe-message'), new RegExp(`whole number of at least 1, not ${typed.replace('.', '\\.')}; it is back to 8`));
    assert.equal(await page.inputValue('#keep-cols'), '8');
  }
  await shot(page, '03b-keep-cols-refused');
  assert.equal(await page.textContent('#status'), kept, 'no run started');
  await page.fill('#keep-cols', '3');
  await page.press('#keep-cols', 'Enter');
  await waitForAnalysis(page, kept);
  assert.match(await page.textContent('#status'), /keep 3 col/);
  assert.equal(await page.isHidden('#recipe-message'), true);
  // A share of weights the core refuses: the field comes back to the last share used.
  const three = await page.textContent('#status');
  await page.selectOption('#keep', 'frac');
  await waitForAnalysis(page, three);
  const share = await page.inputValue('#keep-frac');
  await page.fill('#keep-frac', '50');
  await page.press('#keep-frac', 'Enter');
  await page.waitForFunction(() => !document.getElementById('recipe-message').hidden);
  assert.equal(await page.inputValue('#keep-frac'), share);
  assert.match(await page.textContent('#status'), /refused; the last one that worked is shown/);
  await context.close();
});

test('hovering the error map shows a group and clicking picks it', async () => {
  const { page, context } = await withDemo();
  const box = await page.locator('#error-map').boundingBox();
  await page.mouse.move(box.x + box.width * 0.3, box.y + box.height * 0.5);
  await page.waitForSelector('#map-tooltip:not([hidden])');
  assert.match(await page.textContent('#map-tooltip'), /row \d+ · columns \d+–\d+/);
  await shot(page, '04-map-hover');
  await page.mouse.click(box.x + box.width * 0.3, box.y + box.height * 0.5);
  await page.waitForFunction(() => /row \d+, columns/.test(document.getElementById('hist-caption').textContent));
  await page.focus('#error-map');
  await page.keyboard.press('+');
  await page.keyboard.press('0');
  await context.close();
});

test('a dropped safetensors file lists its tensors and opens the chosen one', async () => {
  const { page, context } = await withDemo();
  await dropFile(page, 'multi.safetensors', fixture('multi.safetensors'));
  await page.waitForSelector('#tensor-list:not([hidden])');
  assert.equal(await page.locator('#tensor-rows tr').count(), 8);
  await page.fill('#tensor-filter', 'block.0');
  assert.equal(await page.locator('#tensor-rows tr').count(), 3);
  const before = await page.textContent('#status');
  await page.click('text=block.0.mlp.up.weight');
  await waitForAnalysis(page, before);
  assert.match(await page.textContent('#tensor-info'), /6 × 5/);
  await page.selectOption('#granularity', 'tensor');
  await page.waitForFunction(() => document.getElementById('status').textContent.includes('per-tensor'));
  await shot(page, '05-safetensors');
  // A click anywhere on a row opens its tensor, not only on the name. (The wait is on the status
  // itself: the per-tensor result above was drawn without `waitForAnalysis` counting it.)
  await page.click('#tensor-rows tr:has-text("block.0.attn.q.weight") td:nth-child(3)');
  await page.waitForFunction(() => /on block\.0\.attn\.q\.weight · analysed/.test(document.getElementById('status').textContent));
  await context.close();
});

test('a pasted matrix is analysed and a broken paste is explained', async () => {
  const { page, context } = await withDemo();
  await page.click('#paste-box summary');
  await page.fill('#paste', '[[0.5, -1.25, 2.0],\n [0.75, 3.5, -0.1]]');
  const before = await page.textContent('#status');
  await page.click('#use-paste');
  await waitForAnalysis(page, before);
  assert.match(await page.textContent('#tensor-info'), /2 × 3/);
  await page.fill('#paste', '1 2 3\n4 5\n');
  await page.click('#use-paste');
  await page.waitForSelector('#input-message:not([hidden])');
  assert.match(await page.textContent('#input-message'), /line 2, column 1/);
  assert.match(await page.textContent('#tensor-info'), /2 × 3/, 'the pasted tensor stays');
  await shot(page, '06-paste-error');
  await context.close();
});

test('a corrupt file gets one message and the earlier results stay usable', async () => {
  const { page, context, requests } = await withDemo();
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  const npy = fixture('quant_weight.npy');
  await dropFile(page, 'cut.npy', npy.subarray(0, npy.length - 1000));
  await page.waitForSelector('#input-message:not([hidden])');
  assert.match(await page.textContent('#input-message'), /truncated/);
  assert.match(await page.textContent('#status'), /int4 asym g128 f16 on demo/, 'the status describes the results on screen');
  await shot(page, '07-corrupt-file');
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on demo' });
  await page.setInputFiles('#file-input', { name: 'garbage.safetensors', mimeType: 'application/octet-stream', buffer: Buffer.from('not a tensor file at all') });
  await page.waitForFunction(() => /garbage.safetensors/.test(document.getElementById('input-message').textContent));
  assert.deepEqual(requests.filter((u) => !sameOrigin(u)), []);
  await context.close();
});

test('a tensor too large for the browser is refused before any allocation', async () => {
  const { page, context } = await withDemo();
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  // A sparse 2.2 GB file whose header lists one f32 tensor of 24576 × 24576 (2.25 GiB as f32).
  const file = sparseSafetensors('huge.weight', 'F32', [24576, 24576], 4);
  await page.setInputFiles('#file-input', file);
  await page.waitForSelector('#input-message:not([hidden])');
  assert.match(await page.textContent('#input-message'), /603979776 elements need 2\.2 GiB as f32/);
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on demo' });
  await context.close();
});

/** A sparse `.safetensors` file of one all-zero tensor (the file system reads the hole as zeros). */
function sparseSafetensors(name, dtype, shape, bytesPerValue) {
  const file = path.join(mkdtempSync(path.join(os.tmpdir(), 'bitloupe-')), `${name}.safetensors`);
  const bytes = shape.reduce((a, b) => a * b, 1) * bytesPerValue;
  const header = Buffer.from(JSON.stringify({ [name]: { dtype, shape, data_offsets: [0, bytes] } }));
  const size = Buffer.alloc(8);
  size.writeBigUInt64LE(BigInt(header.length));
  const fd = openSync(file, 'w');
  writeSync(fd, size);
  writeSync(fd, header);
  ftruncateSync(fd, 8 + header.length + bytes);
  closeSync(fd);
  return file;
}

test('the largest tensor the browser holds is analysed, and a method that needs more memory is refused before it starts', async () => {
  const { page, context } = await openPage(browser);
  // 131071 × 4096 values, one row short of 2^29: 2 GiB less 16 KiB as f32, the largest array a
  // wasm32 program can hold (Rust caps an allocation at isize::MAX bytes). Round to nearest
  // keeps no reconstruction, so it fits the page's 4 GiB beside the tensor.
  const file = sparseSafetensors('wide.embed', 'BF16', [131071, 4096], 2);
  await page.setInputFiles('#file-input', file);
  await page.waitForFunction(() => document.getElementById('status').textContent.includes('analysed in'), null, { timeout: 180_000 });
  assert.match(await page.textContent('#status'), /int4 asym g128 f16 on wide\.embed/);
  const before = await pageState(page);
  // HQQ keeps its reconstruction: another 2 GiB, which the 4 GiB cannot give. The core's memory
  // estimate refuses it before anything is allocated, so the worker and its tensor stay.
  await page.selectOption('#method', 'hqq');
  await page.waitForSelector('#recipe-message:not([hidden])', { timeout: 180_000 });
  assert.match(await page.textContent('#recipe-message'), /hqq on its 536866816 elements needs about 2\.\d\d GiB of memory beside the tensor's own 2\.00 GiB, and 1\.\d\d GiB are available of the page's 4 GiB; the command-line tool has no such limit/);
  assert.doesNotMatch(await page.textContent('#input-message'), /reloaded|restarted/);
  await shot(page, '08-largest-tensor');
  // Its reconstruction, made again for the export, and the file (2 GiB each, and as much again to
  // check a packed file by reading it back) would not fit beside it: refused before anything is
  // allocated, with the way to get it.
  await page.click('#download-npy');
  await page.waitForFunction(() => /Nothing was saved/.test(document.getElementById('export-message').textContent));
  assert.match(await page.textContent('#export-message'), /exporting the reconstruction of these 536866816 values needs about 6\.\d\d GiB of memory beside what is held, and 1\.\d\d GiB are available of the page's 4 GiB; the command-line tool writes it/);
  const after = await pageState(page);
  assert.equal(after.tensor, before.tensor, 'the tensor stays');
  assert.deepEqual(after.figures, before.figures, 'the last result stays on screen');
  // A sweep of round to nearest and HQQ: HQQ cannot fit, so it is skipped and counted, and round
  // to nearest still runs.
  for (const [name, values] of Object.entries({ 'sweep-format': ['nf4', 'mxfp4'], 'sweep-bits': ['2', '3', '8'], 'sweep-group': ['32', '64', 'row'] })) {
    for (const value of values) await page.uncheck(`input[name=${name}][value="${value}"]`);
  }
  await page.check('input[name=sweep-method][value=hqq]');
  await page.click('#sweep-run');
  await page.waitForFunction(() => /recipes? run/.test(document.getElementById('sweep-status').textContent), null, { timeout: 180_000 });
  assert.match(await page.textContent('#sweep-status'), /^1 recipe run, 1 on the front, 1 combination skipped: hqq needs more memory than the page has left \(the command-line tool has no such limit\) \(1\)\.$/);
  assert.doesNotMatch(await page.textContent('#input-message'), /reloaded|restarted/);
  // Calibration adds the output error: the plain recipe takes it one row block at a time, so no
  // reconstruction is held beside the 2 GiB tensor.
  const sample = npyF32(16, 4096, (i) => Math.cos(i * 0.11));
  await page.setInputFiles('#calib-input', { name: 'acts.npy', mimeType: 'application/octet-stream', buffer: sample });
  await waitForAnalysis(page, await page.textContent('#status'));
  assert.equal(await page.isVisible('#fig-output-card'), true, 'the output error is shown');
  assert.equal(await page.isHidden('#recipe-message'), true, 'and nothing was refused');
  assert.doesNotMatch(await page.textContent('#input-message'), /reloaded|restarted/);
  await context.close();
});

test('a second tensor as large opens in place of the first, and a refused one brings it back', async () => {
  const { page, context } = await openPage(browser);
  // Two tensors of 2 GiB as f32 cannot sit side by side in the page's 4 GiB: the one on screen
  // gives way before the next is read.
  const bigStatus = { timeout: 180_000 };
  const analysedOn = (name) => page.waitForFunction((n) => document.getElementById('status').textContent.includes(`analysed in`) && document.getElementById('status').textContent.includes(n), name, bigStatus);
  await page.setInputFiles('#file-input', sparseSafetensors('first.embed', 'BF16', [131071, 4096], 2));
  await analysedOn('on first.embed');
  await page.setInputFiles('#file-input', sparseSafetensors('second.embed', 'BF16', [131071, 4096], 2));
  await analysedOn('on second.embed');
  const before = await pageState(page);
  // A third whose one NaN is found only once it is read: refused, and the worker, which had let
  // the second go, reads the second again.
  const nanFile = sparseSafetensors('third.embed', 'BF16', [131071, 4096], 2);
  const fd = openSync(nanFile, 'r+');
  const headerSize = Buffer.alloc(8);
  readSync(fd, headerSize, 0, 8, 0);
  // bf16 NaN 0x7fc0, little-endian, at value 1000 (row 0, column 1000).
  writeSync(fd, Buffer.from([0xc0, 0x7f]), 0, 2, 8 + Number(headerSize.readBigUInt64LE()) + 2 * 1000);
  closeSync(fd);
  await page.setInputFiles('#file-input', nanFile);
  await page.waitForFunction(() => /reloaded/.test(document.getElementById('input-message').textContent), null, bigStatus);
  assert.match(await page.textContent('#input-message'), /1 NaN and 0 infinite values \(first at row 0, column 1000\).*reloaded/);
  await analysedOn('on second.embed');
  const after = await pageState(page);
  assert.equal(after.tensor, before.tensor, 'the second tensor is back');
  assert.deepEqual(after.figures, before.figures);
  await context.close();
});

test('a NaN tensor is refused with its count and place, and the old one stays', async () => {
  const { page, context } = await withDemo();
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  await page.click('#paste-box summary');
  await page.fill('#paste', '1 2\nnan 4\n');
  await page.click('#use-paste');
  await page.waitForSelector('#input-message:not([hidden])');
  assert.match(await page.textContent('#input-message'), /1 NaN and 0 infinite values \(first at row 1, column 0\)/);
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on demo' });
  await context.close();
});

test('a new tensor whose first recipe fails shows no stale results and offers no stale export', async () => {
  const { page, context, errors } = await withDemo();
  await page.click('#paste-box summary');
  // A range of 2e6 in 15 steps needs a scale of 1.3e5, beyond f16's largest finite value 65504
  // (IEEE 754 binary16): the default recipe cannot be applied, bf16 scales can.
  await page.fill('#paste', '1e6 -1e6\n1 2\n');
  await page.click('#use-paste');
  await page.waitForSelector('#recipe-message:not([hidden])');
  assert.match(await page.textContent('#tensor-info'), /2 × 2/, 'the pasted tensor is the open one');
  assert.equal(await page.isVisible('#report'), false, 'the demo\'s results are not shown under the new tensor');
  assert.match(await page.textContent('#empty-text'), /No results for this tensor/);
  assert.doesNotMatch(await page.textContent('#recipe-message'), /results below/);
  assert.equal(await page.isVisible('#download-report'), false, 'no export of results that are gone');
  await shot(page, '06b-first-recipe-failed');
  const before = await page.textContent('#status');
  await page.selectOption('#scale-dtype', 'bf16');
  await waitForAnalysis(page, before);
  assert.equal(await page.isVisible('#report'), true);
  assert.match(await page.textContent('#status'), /bf16 on pasted/);
  assert.deepEqual(errors, []);
  await context.close();
});

test('a NaN tensor of another width leaves the calibration in place', async () => {
  const { page, context } = await withDemoCalibration();
  await page.click('#paste-box summary');
  await page.fill('#paste', '1 2\nnan 4\n');
  await page.click('#use-paste');
  await page.waitForSelector('#input-message:not([hidden])');
  assert.match(await page.textContent('#input-message'), /1 NaN and 0 infinite values/);
  // The next run of the demo tensor still measures the output error on the calibration sample.
  const status = await page.textContent('#status');
  await page.selectOption('#bits', '4');
  await waitForAnalysis(page, status);
  assert.equal(await page.isHidden('#fig-output-card'), false, 'the output error is still measured');
  await context.close();
});

test('a long run can be cancelled and the previous results stay', async () => {
  const { page, context } = await withDemo();
  // HQQ's iterations make opening a 4096 × 4096 tensor take seconds, long enough to cancel.
  const demoStatus = await page.textContent('#status');
  await page.selectOption('#method', 'hqq');
  await waitForAnalysis(page, demoStatus);
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  // A 4096 × 4096 tensor made in the page.
  await page.evaluate(() => {
    const rows = 4096, cols = 4096;
    const header = "{'descr': '<f4', 'fortran_order': False, 'shape': (4096, 4096), }";
    const padded = header + ' '.repeat(64 - ((10 + header.length + 1) % 64)) + '\n';
    const head = new Uint8Array(10 + padded.length);
    head.set([0x93, 78, 85, 77, 80, 89, 1, 0, padded.length & 255, padded.length >> 8]);
    head.set(new TextEncoder().encode(padded), 10);
    const data = new Float32Array(rows * cols);
    for (let i = 0; i < data.length; i++) data[i] = Math.sin(i * 0.37) * 0.02;
    const file = new File([head, data], 'big.npy');
    const transfer = new DataTransfer();
    transfer.items.add(file);
    window.dispatchEvent(new DragEvent('drop', { dataTransfer: transfer, bubbles: true, cancelable: true }));
  });
  await page.waitForSelector('#busy:not([hidden])', { timeout: 20_000 });
  await page.click('#cancel');
  await page.waitForFunction(() => document.getElementById('status').textContent.startsWith('Cancelled'));
  await shot(page, '08-cancelled');
  // The restarted worker holds the demo tensor and its analysis again.
  await assertNothingLost(page, before, reportBefore, { bits: 5, label: 'int5 asym g128 f16 hqq on demo' });
  await context.close();
});

test('after the first visit the page works offline', async () => {
  const { page, context } = await openPage(browser);
  await page.evaluate(() => navigator.serviceWorker.ready);
  await page.reload();
  await page.waitForFunction(() => navigator.serviceWorker.controller !== null);
  await context.setOffline(true);
  await page.reload();
  await page.waitForSelector('body[data-ready=true]', { timeout: 30_000 });
  await page.click('#load-demo-big');
  await waitForAnalysis(page);
  await shot(page, '09-offline');
  await context.close();
});

test('dark mode and a projector-sized window stay readable', async () => {
  const { page, context } = await openPage(browser, { viewport: { width: 1024, height: 768 }, colorScheme: 'dark' });
  await page.click('#load-demo-big');
  await waitForAnalysis(page);
  await shot(page, '10-dark-1024');
  await context.close();
});

test('the single-file page works opened straight from disk', async () => {
  const file = process.env.BITLOUPE_SINGLE_FILE || 'dist/bitloupe.html';
  const context = await browser.newContext({ viewport: { width: 1280, height: 900 } });
  const page = await context.newPage();
  const requests = [];
  context.on('request', (r) => requests.push(r.url()));
  await page.goto(pathToFileURL(file).href);
  await page.waitForSelector('body[data-ready=true]', { timeout: 30_000 });
  await page.click('#load-demo-big');
  await waitForAnalysis(page);
  assert.equal(await page.textContent('#fig-bpw'), '4.1563');
  const outside = requests.filter((u) => !u.startsWith('blob:') && !u.startsWith('data:') && u !== pathToFileURL(file).href);
  assert.deepEqual(outside, [], 'the single file loads nothing but itself');
  await shot(page, '11-single-file');
  await context.close();
});

async function withDemoCalibration() {
  const session = await withDemo();
  const before = await session.page.textContent('#status');
  await session.page.click('#calib-demo');
  await waitForAnalysis(session.page, before);
  await session.page.waitForSelector('#fig-output-card:not([hidden])');
  return session;
}

const percent = async (page, id) => Number((await page.textContent(id)).replace(/[^\d.]/g, ''));

test('calibration adds the output error, and GPTQ lowers it', async () => {
  const { page, context } = await withDemoCalibration();
  assert.match(await page.textContent('#calib-info'), /512 tokens × 4,096 columns/);
  const rtn = await percent(page, '#fig-output');
  const before = await page.textContent('#status');
  await page.selectOption('#method', 'gptq');
  await page.waitForFunction((b) => { const s = document.getElementById('status').textContent; return s !== b && s.includes('gptq'); }, before, { timeout: 120_000 });
  const gptq = await percent(page, '#fig-output');
  assert.ok(gptq < rtn / 2, `GPTQ ${gptq} % vs round to nearest ${rtn} %`);
  assert.match(await page.textContent('#method-figures'), /GPTQ: dampening 0\.01/);
  await page.selectOption('#map-metric', 'out');
  assert.match(await page.textContent('#map-caption'), /one cell per output row/);
  await shot(page, '12-gptq-with-calibration');
  await context.close();
});

test('AWQ shows its alpha curve and smoothing runs the W8A8 study', async () => {
  const { page, context } = await withDemoCalibration();
  const before = await page.textContent('#status');
  await page.selectOption('#method', 'awq');
  await page.waitForFunction((b) => { const s = document.getElementById('status').textContent; return s !== b && s.includes('awq'); }, before, { timeout: 120_000 });
  assert.match(await page.textContent('#method-figures'), /chose α = \d\.\d\d/);
  assert.equal(await page.isVisible('#method-curve'), true);
  await page.click('#study-run');
  await page.waitForFunction(() => /W8A8 with/.test(document.getElementById('smooth-figures').textContent), null, { timeout: 120_000 });
  assert.match(await page.textContent('#smooth-figures'), /without smoothing, [\d.]+ % with α = 0\.50/);
  await page.fill('#smooth-alpha', '0.8');
  await page.dispatchEvent('#smooth-alpha', 'input');
  await page.waitForFunction(() => /after \(α 0\.80\)/.test(document.getElementById('smooth-columns').textContent));
  await shot(page, '13-awq-and-smoothing');
  await context.close();
});

test('the smoothing plot draws its two "after" lines so that neither hides the other', async () => {
  const { page, context } = await withDemoCalibration();
  await page.waitForFunction(() => /max \|x\| after/.test(document.getElementById('smooth-columns').textContent));
  // At α 0.5 smoothing makes a column's two maxima equal (both become √(max|w|·max|x|)), so
  // the two lines lie on one another: one is drawn wide and the other dashed over it, and each
  // legend marker is a stretch of its own line.
  const markers = Object.fromEntries(await page.$$eval('#smooth-columns .u-legend .u-series', (rows) => rows.slice(1).map((row) => {
    const style = getComputedStyle(row.querySelector('.u-marker'));
    return [row.querySelector('.u-label').textContent, { line: style.borderTopStyle, width: parseFloat(style.borderTopWidth), left: parseFloat(style.borderLeftWidth) }];
  })));
  const weights = markers['max |w| after (α 0.50)'];
  const acts = markers['max |x| after'];
  assert.equal(weights.line, 'solid');
  assert.equal(acts.line, 'dashed');
  assert.ok(weights.width > acts.width, JSON.stringify(markers));
  assert.equal(weights.left + acts.left, 0, 'a line, not a box');
  const svg = (await downloaded(page, 'button[data-chart="smooth-columns"]:text("SVG")')).toString();
  assert.match(svg, /<polyline fill="none" stroke="[^"]+" stroke-width="3" points=/);
  assert.match(svg, /<polyline fill="none" stroke="[^"]+" stroke-width="1\.5" stroke-dasharray="6 4" points=/);
  await shot(page, '13b-smoothing-lines');
  await context.close();
});

/** The choices of the select `id` that its width cuts: all of them when its widest does not fit. */
function cutChoices(page, id) {
  return page.evaluate((id) => {
    const select = document.getElementById(id);
    // A select as wide as its widest choice, in the same place and style.
    const natural = select.cloneNode(true);
    natural.removeAttribute('id');
    natural.style.cssText = 'position: absolute; width: auto; max-width: none; flex: none;';
    select.parentElement.append(natural);
    const needed = natural.getBoundingClientRect().width;
    natural.remove();
    return needed > select.getBoundingClientRect().width + 0.5 ? [...select.options].map((o) => o.text) : [];
  }, id);
}

/** The side bar's selects (calibration and recipe) whose width cuts their widest choice, by id. */
async function cutSideChoices(page) {
  const cut = {};
  for (const id of await page.$$eval('.side select', (selects) => selects.map((s) => s.id))) {
    const choices = await cutChoices(page, id);
    if (choices.length) cut[id] = choices;
  }
  return cut;
}

/** The headline figures wider than their cards. */
function overflowingFigures(page) {
  return page.$$eval('#headline .value', (values) => values.filter((v) => v.scrollWidth > v.clientWidth).map((v) => v.id));
}

test('the headline figures fit one row at 1400 px with calibration, and nothing is cut in a narrow window', async () => {
  const { page, context } = await withDemoCalibration();
  const tops = await page.$$eval('#headline .figure:not([hidden])', (cards) => cards.map((c) => Math.round(c.getBoundingClientRect().top)));
  assert.equal(tops.length, 6);
  assert.equal(new Set(tops).size, 1, `one row: ${tops}`);
  assert.deepEqual(await overflowingFigures(page), []);
  assert.deepEqual(await cutSideChoices(page), {});
  await shot(page, '12b-headline-1400');
  await context.close();
  // A phone-sized window: the figures wrap, and still no value, choice or card is cut.
  const narrow = await openPage(browser, { viewport: { width: 375, height: 800 } });
  await narrow.page.click('#load-demo-big');
  const status = await waitForAnalysis(narrow.page);
  await narrow.page.click('#calib-demo');
  await waitForAnalysis(narrow.page, status);
  assert.deepEqual(await cutSideChoices(narrow.page), {});
  assert.deepEqual(await overflowingFigures(narrow.page), []);
  assert.ok(await narrow.page.evaluate(() => document.documentElement.scrollWidth <= innerWidth), 'no sideways scrolling');
  await shot(narrow.page, '12c-narrow-375');
  await narrow.context.close();
});

test('a tensor of another width removes the calibration, and says so at the top', async () => {
  const { page, context } = await withDemo();
  const weightOnly = await page.textContent('#status');
  await page.click('#calib-demo');
  const shown = await waitForAnalysis(page, weightOnly);
  assert.doesNotMatch(await page.textContent('#calib-info'), /^None/);
  await page.click('#paste-box summary');
  await page.fill('#paste', '0.5 -1 2\n0.25 3 -0.5\n');
  await page.click('#use-paste');
  await waitForAnalysis(page, shown);
  assert.equal(await page.textContent('#input-message'), 'The calibration (4,096 columns) was removed: this tensor has 3 input columns. Add calibration of that width to measure the output error.');
  assert.match(await page.textContent('#calib-info'), /^None/);
  await context.close();
});

test('calibration of the wrong width is refused and the weight-only view goes on', async () => {
  const { page, context } = await withDemo();
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  await page.setInputFiles('#calib-input', { name: 'acts.npy', mimeType: 'application/octet-stream', buffer: fixture('quant_weight.npy') });
  await page.waitForSelector('#calib-message:not([hidden])');
  assert.match(await page.textContent('#calib-message'), /300 columns but the weight has 4096 input columns/);
  await shot(page, '14-calibration-refused');
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on demo' });
  assert.equal(await page.isHidden('#fig-output-card'), true);
  await context.close();
});

test('a long GPTQ run can be cancelled: recipe, calibration and results come back', async () => {
  const { page, context } = await withDemoCalibration();
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  await page.selectOption('#method', 'gptq');
  await page.waitForSelector('#busy:not([hidden])');
  await page.click('#cancel');
  await page.waitForFunction(() => document.getElementById('status').textContent.startsWith('Cancelled'));
  assert.equal(await page.inputValue('#method'), 'rtn', 'the controls describe the results on screen again');
  // The restarted worker has the tensor, the calibration and the analysis again.
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on demo' });
  await page.selectOption('#method', 'clip');
  await page.waitForFunction(() => document.getElementById('status').textContent.includes('clip on demo'), null, { timeout: 60_000 });
  assert.equal(await page.isVisible('#fig-output-card'), true);
  await context.close();
});

test('calibration dropped on its box offers the tensors of a several-tensor file', async () => {
  const { page, context } = await withDemo();
  await dropFile(page, 'multi.safetensors', fixture('multi.safetensors'), '#calib-card');
  await page.waitForSelector('#calib-pick:not([hidden])');
  assert.equal(await page.locator('#calib-tensor option').count(), 9);
  assert.match(await page.textContent('#tensor-info'), /1024 × 4096/, 'the weight is untouched');
  await page.selectOption('#calib-tensor', 'block.0.mlp.up.weight');
  await page.waitForSelector('#calib-message:not([hidden])');
  assert.match(await page.textContent('#calib-message'), /5 columns but the weight has 4096/);
  await context.close();
});

test('the format selector shows each format with its own controls and code points', async () => {
  const { page, context } = await withDemo();
  const pick = async (format, label) => {
    const before = await page.textContent('#status');
    await page.selectOption('#format', format);
    await page.waitForFunction(([b, l]) => { const s = document.getElementById('status').textContent; return s !== b && s.includes(l); }, [before, label], { timeout: 60_000 });
  };
  await pick('nf4', 'nf4 g64 f16');
  assert.equal(await page.textContent('#fig-bpw'), '4.2500', '4 + 16/64');
  assert.equal(await page.isVisible('#double-quant'), true);
  assert.equal(await page.isVisible('#symmetric'), false);
  await page.waitForFunction(() => /16 grid levels/.test(document.getElementById('hist-caption').textContent));
  await shot(page, '15-nf4');
  await page.check('#double-quant');
  await page.waitForFunction(() => document.getElementById('status').textContent.includes('nf4 g64 f16 dq'));
  assert.equal(await page.textContent('#fig-bpw'), '4.1270', 'QLoRA: 4 + 8/64 + 32/(64·256)');
  await pick('mxfp4', 'mxfp4');
  assert.equal(await page.textContent('#fig-bpw'), '4.2500', 'OCP MX: 4 + 8/32');
  assert.equal(await page.isVisible('#granularity'), false);
  await pick('e4m3', 'e4m3 g32');
  await pick('codebook', 'codebook4 per-row');
  await page.waitForFunction(() => /16 grid levels/.test(document.getElementById('hist-caption').textContent));
  await shot(page, '16-codebook');
  await context.close();
});

test('a sweep fills the chart, marks the front, and a row loads its recipe', async () => {
  const { page, context } = await withDemo();
  for (const box of await page.locator('input[name=sweep-bits]').all()) await box.uncheck();
  await page.check('input[name=sweep-bits][value="3"]');
  await page.check('input[name=sweep-bits][value="4"]');
  await page.uncheck('input[name=sweep-group][value="32"]');
  await page.uncheck('input[name=sweep-group][value="128"]');
  await page.click('#sweep-run');
  await page.waitForFunction(() => /recipes? run, \d+ on the front, \d+ combinations? skipped/.test(document.getElementById('sweep-status').textContent), null, { timeout: 120_000 });
  const status = await page.textContent('#sweep-status');
  const [, run, front] = status.match(/(\d+) recipes? run, (\d+) on the front/).map(Number);
  // int 3,4 bits × 64,row = 4; NF4 × 64,row = 2; MXFP4 (blocks of 32 only) = 0, and the status
  // says why it is missing.
  assert.equal(run, 6);
  assert.match(status, /2 combinations skipped: mxfp4 shares one scale per block of 32 \(the MX specification\); use groups of 32 \(2\)\.$/);
  assert.ok(front >= 2 && front <= run);
  assert.equal(await page.locator('#sweep-rows tr').count(), front);
  await shot(page, '17-sweep');
  // Another error axis marks the front again from the figures the rows hold: no run.
  const sweepsRun = () => page.evaluate(() => window.bitloupeTimings.filter((t) => t.what === 'sweep-compute').length);
  const ran = await sweepsRun();
  await page.selectOption('#sweep-by', 'mse');
  // Long enough for this sweep to have run again, had the change started one.
  await page.waitForTimeout(1500);
  assert.equal(await sweepsRun(), ran);
  assert.match(await page.textContent('#sweep-status'), new RegExp(`^${run} recipes run, \\d+ on the front`));
  assert.equal(await page.locator('#sweep-rows tr').count(), Number((await page.textContent('#sweep-status')).match(/(\d+) on the front/)[1]));
  await shot(page, '17-sweep-mse');
  // The log axis's labels (uPlot's own read 0, 0, 0 below a thousandth).
  const ticks = await page.evaluate(async () => {
    const { logTick } = await import('./format.js');
    return [1e-4, 2e-5, 0.05, 300, 2e5].map(logTick);
  });
  assert.deepEqual(ticks, ['1e-4', '2e-5', '0.05', '300', '2e+5']);
  await page.selectOption('#sweep-by', 'sqnr');
  // The chart is drawn anew once the worker has marked the front against SQNR.
  await page.waitForSelector('#sweep-chart[data-by=sqnr] .u-over');
  // A click on the scatter loads the recipe under the cursor.
  const plot = await page.locator('#sweep-chart .u-over').boundingBox();
  const beforeClick = await page.textContent('#status');
  await page.mouse.click(plot.x + plot.width * 0.95, plot.y + plot.height / 2);
  await waitForAnalysis(page, beforeClick);
  const label = await page.textContent('#sweep-rows tr:first-child td:first-child');
  const before = await page.textContent('#status');
  await page.click('#sweep-rows tr:first-child');
  await waitForAnalysis(page, before);
  assert.match(await page.textContent('#status'), new RegExp(`^${label.replace(/[.*+?^${}()|[\]\\]/g, '\\$&')} on demo`));
  // A sweep belongs to its tensor: another tensor clears it.
  const shown = await page.textContent('#status');
  await page.click('#paste-box summary');
  await page.fill('#paste', '0.5 -1 2\n0.25 3 -0.5\n');
  await page.click('#use-paste');
  await waitForAnalysis(page, shown);
  assert.equal(await page.isVisible('#sweep-chart'), false);
  assert.equal(await page.textContent('#sweep-status'), '');
  await context.close();
});

test('exports land and parse, and a link restores the recipe in a fresh page', async () => {
  const { page, context } = await withDemo();
  await page.selectOption('#format', 'nf4');
  await page.waitForFunction(() => document.getElementById('status').textContent.includes('nf4 g64'));
  const grab = (id) => downloadOf(page, id);
  const report = await grab('#download-report');
  const json = JSON.parse(report.bytes.toString());
  assert.equal(json.schema, 'bitloupe.report/1');
  assert.equal(json.recipe.format, 'nf4');
  const md = await grab('#download-markdown');
  assert.match(md.bytes.toString(), /^### Quantizing `demo\.block3\.ffn\.up\.weight`[\s\S]*\| bits per weight \| 4\.2500 \|[\s\S]*proxy/);
  const csv = await grab('#download-groups');
  assert.equal(csv.bytes.toString().trim().split('\n').length, 1 + 1024 * 64);
  const npy = await grab('#download-npy');
  assert.equal(npy.bytes.subarray(0, 6).toString('latin1'), '\x93NUMPY');
  assert.equal(npy.bytes.length, 128 + 4 * 1024 * 4096);
  const packed = await grab('#download-packed');
  const headerLength = Number(packed.bytes.readBigUInt64LE(0));
  const header = JSON.parse(packed.bytes.subarray(8, 8 + headerLength).toString());
  assert.equal(header.__metadata__['bitloupe.packed'], '1');
  assert.ok(header.codes && header.scales);
  // The link carries the recipe, not the data.
  const link = page.url();
  assert.match(link, /#recipe=/);
  assert.ok(link.length < 1000);
  const fresh = await context.newPage();
  await fresh.goto(link);
  await fresh.waitForSelector('body[data-ready=true]');
  assert.equal(await fresh.inputValue('#format'), 'nf4');
  assert.equal(await fresh.inputValue('#granularity'), '64');
  await fresh.click('#load-demo-big');
  await waitForAnalysis(fresh);
  assert.match(await fresh.textContent('#status'), /nf4 g64 f16 on demo/);
  await context.close();
});

test('the model size sums the chosen tensors of the dropped shards under the recipe', async () => {
  const { page, context } = await withDemo();
  await page.click('#size-run');
  await page.waitForFunction(() => /billion parameters/.test(document.getElementById('size-figures').textContent));
  // 7e9 weights at 4 + 20/128 bits per weight: 3.64 GB.
  assert.match(await page.textContent('#size-figures'), /total 3\.64 GB, which fits in 8\.00 GB/);
  await page.setInputFiles('#size-files', [{ name: 'multi.safetensors', mimeType: 'application/octet-stream', buffer: fixture('multi.safetensors') }]);
  await page.waitForFunction(() => /1 shard:/.test(document.getElementById('size-figures').textContent));
  // The tensors `bitloupe report` quantizes on this file: three floating-point matrices of
  // eight; the integer ones and the 1-D norm scale stay as stored (tests/cli.rs).
  assert.match(await page.textContent('#size-figures'), /3 tensors quantized \(78 weights, 216 bytes → .*\), 5 tensors kept as stored \(124 bytes\)/);
  await page.fill('#size-pattern', '*attn*');
  await page.click('#size-run');
  await page.waitForFunction(() => /2 tensors quantized/.test(document.getElementById('size-figures').textContent));
  await page.check('#size-1d');
  await page.fill('#size-pattern', '*');
  await page.click('#size-run');
  await page.waitForFunction(() => /4 tensors quantized/.test(document.getElementById('size-figures').textContent));
  await context.close();
});

test('two pinned recipes compare side by side with their difference', async () => {
  const { page, context } = await withDemo();
  await page.click('#pin-a');
  const before = await page.textContent('#status');
  await page.selectOption('#bits', '3');
  await waitForAnalysis(page, before);
  await page.click('#pin-b');
  await page.waitForSelector('#compare-body:not([hidden])');
  assert.equal(await page.textContent('#label-a'), 'int4 asym g128 f16');
  assert.equal(await page.textContent('#label-b'), 'int3 asym g128 f16');
  // int3 asym g128 f16 costs 3 + (16 + 3)/128 = 3.1484 bits per weight.
  const rows = await page.locator('#compare-rows tr').allTextContents();
  assert.ok(rows.some((r) => r.startsWith('bits per weight4.15633.1484−1.0078')), rows.join(' | '));
  assert.equal(await page.isVisible('#diff-figure'), true);
  // A and B share one colour scale; the difference has its own, linear and centred on no change,
  // so its ends are the largest difference either way.
  const [legendA, legendB, legendDiff] = [await legendOf(page, 'map-a'), await legendOf(page, 'map-b'), await legendOf(page, 'map-diff')];
  assert.deepEqual(legendA, legendB);
  assert.ok(Number(legendA.lo) > 0 && Number(legendA.hi) > Number(legendA.lo), JSON.stringify(legendA));
  assert.match(legendDiff.lo, /^−\d/);
  assert.equal(legendDiff.hi, legendDiff.lo.replace('−', '+'));
  const { diverging, sequential } = await page.evaluate(async () => {
    const colours = await import('./colors.js');
    return { diverging: colours.DIVERGING_COLOURS, sequential: colours.STOP_COLOURS };
  });
  assert.equal(legendDiff.ramp, `linear-gradient(to right, ${diverging.join(', ')})`);
  assert.equal(legendA.ramp, `linear-gradient(to right, ${sequential.join(', ')})`);
  // The bits of each recipe, listed by part, and both bars on one scale: B's parts fill
  // 3.1484 / 4.1563 of its bar (4 + (16 + 4)/128 bits per weight for A, as above for B).
  assert.match(await page.textContent('#budget-a-legend'), /codes \(payload\): [\d,]+ bits = 4\.0000 bits per weight[\s\S]*total: [\d,]+ bits = 4\.1563 bits per weight/);
  assert.match(await page.textContent('#budget-b-legend'), /codes \(payload\): [\d,]+ bits = 3\.0000 bits per weight[\s\S]*total: [\d,]+ bits = 3\.1484 bits per weight/);
  const filled = (id) => page.evaluate((id) => {
    const bar = document.getElementById(id);
    return [...bar.children].reduce((sum, part) => sum + part.getBoundingClientRect().width, 0) / bar.clientWidth;
  }, id);
  assert.ok(Math.abs((await filled('budget-a')) - 1) < 0.01);
  assert.ok(Math.abs((await filled('budget-b')) - 3.1484 / 4.1563) < 0.01, `B's bar is ${await filled('budget-b')} full`);
  assert.match(await page.textContent('#compare-budget-scale'), /full width is 4\.1563 bits per weight/);
  // The difference map's files carry its title and colour scale; its PNG is that frame drawn
  // at twice the SVG's 720 × 360 (svg.js).
  const svg = (await downloaded(page, 'button[data-chart="map-diff"]:text("SVG")')).toString();
  assert.match(svg, /B − A: int3 asym g128 f16 against int4 asym g128 f16/);
  for (const colour of diverging) assert.ok(svg.includes(`stop-color="${colour}"`), colour);
  assert.ok(svg.includes(`>${legendDiff.lo}</text>`) && svg.includes(`>${legendDiff.hi}</text>`));
  assert.match(svg, /blue where B is lower, grey equal, red higher/);
  assert.deepEqual(pngSize(await downloaded(page, 'button[data-chart="map-diff"]:text("PNG")')), [1440, 720]);
  const svgA = (await downloaded(page, 'button[data-chart="map-a"]:text("SVG")')).toString();
  assert.ok(svgA.includes(`>${legendA.lo}</text>`) && svgA.includes(`>${legendA.hi}</text>`) && svgA.includes('one scale for A and B'));
  await shot(page, '18-compare');
  // Another tensor opened: the pins stay, said to belong to the tensor they were taken on.
  assert.equal(await page.textContent('#compare-hint'), '');
  const shown = await page.textContent('#status');
  await page.click('#paste-box summary');
  await page.fill('#paste', '0.5 -1 2\n0.25 3 -0.5\n');
  await page.click('#use-paste');
  await waitForAnalysis(page, shown);
  assert.match(await page.textContent('#compare-hint'), /^A and B are results on demo.*\(1024 × 4096\), not on the tensor open now/);
  await context.close();
});

test('every chart downloads as PNG and as SVG', async () => {
  const { page, context } = await withDemo();
  await page.waitForFunction(() => /grid levels/.test(document.getElementById('hist-caption').textContent));
  const svgs = {};
  for (const chart of ['error-map', 'column-profile', 'histogram']) {
    const png = await downloaded(page, `button[data-chart="${chart}"]:text("PNG")`);
    assert.equal(png.subarray(1, 4).toString(), 'PNG', `${chart} PNG`);
    const svg = (await downloaded(page, `button[data-chart="${chart}"]:text("SVG")`)).toString();
    assert.match(svg, /^<\?xml[\s\S]*<svg xmlns="http:\/\/www\.w3\.org\/2000\/svg"[\s\S]*<\/svg>\s*$/, `${chart} SVG`);
    svgs[chart] = svg;
  }
  // The column profile keeps the page's two y axes, each with its title and its own ticks: max |w|
  // on the left (the demo's columns reach 0.1 to several hundred) and the error RMS on the right
  // (below 0.1 in every column of the demo at int4: this session's page, not a published figure).
  const axis = (side) => {
    const group = svgs['column-profile'].match(new RegExp(`<g class="y-axis ${side}">([\\s\\S]*?)</g>`));
    assert.ok(group, `a ${side} y axis`);
    return { title: group[1].match(/rotate\([-\d]+\)" text-anchor="middle">([^<]*)</)[1], ticks: [...group[1].matchAll(/>([-\d.e+]+)<\/text>/g)].map((m) => Number(m[1])) };
  };
  const [left, right] = [axis('left'), axis('right')];
  assert.equal(left.title, 'max |w| (log)');
  assert.equal(right.title, 'error RMS (log)');
  assert.ok(left.ticks.length >= 2 && right.ticks.length >= 2, JSON.stringify({ left, right }));
  assert.ok(Math.max(...left.ticks) >= 1 && Math.max(...right.ticks) < 0.1, JSON.stringify({ left, right }));
  // The error map's PNG is its SVG frame drawn, with the title and colour scale (svg.js: 720 × 360, twice).
  assert.deepEqual(pngSize(await downloaded(page, 'button[data-chart="error-map"]:text("PNG")')), [1440, 720]);
  const { lo, hi } = await legendOf(page, 'error-map');
  assert.ok(svgs['error-map'].includes(`>${lo}</text>`) && svgs['error-map'].includes(`>${hi}</text>`));
  await context.close();
});
