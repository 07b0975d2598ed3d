// Nothing lost on the page when a run fails or its worker dies, and nothing leaves the machine.
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import {
  launch, openPage, fixture, shot, dropFile, waitForAnalysis, npyF32, pageState, reportFigures, assertNothingLost,
  URL_UNDER_TEST,
} from './harness.mjs';

let browser;
before(async () => { browser = await launch(); });
after(async () => { await browser?.close(); });

async function withDemoCalibration() {
  const session = await openPage(browser);
  const { page } = session;
  await page.click('#load-demo-big');
  const status = await waitForAnalysis(page);
  await page.click('#calib-demo');
  await waitForAnalysis(page, status);
  assert.equal(await page.isVisible('#fig-output-card'), true);
  return session;
}

test('a run that cannot fit the wasm memory is refused before it starts, and nothing is lost', async () => {
  const { page, context } = await openPage(browser);
  // GPTQ holds the Hessian, cols × cols in f32 (2.0 GiB at 23168 input columns), and the factor
  // of its inverse beside it: the two exceed the 4 GiB a wasm32 worker can address (WebAssembly
  // core specification: 32-bit memory indices). The core's memory estimate says so before
  // anything is allocated: the worker, its tensor and calibration stay, and nothing restarts.
  // (An allocation that fails anyway is reported with its size: tests/wasm_boundary.rs; a worker
  // that stops is replaced with everything it held: the next test.)
  const cols = 23168;
  let status = await page.textContent('#status');
  const weight = npyF32(64, cols, (i) => Math.sin(i * 0.37) * 0.02);
  await page.setInputFiles('#file-input', { name: 'wide.npy', mimeType: 'application/octet-stream', buffer: weight });
  status = await waitForAnalysis(page, status);
  const sample = npyF32(64, cols, (i) => Math.cos(i * 0.11));
  await page.setInputFiles('#calib-input', { name: 'acts.npy', mimeType: 'application/octet-stream', buffer: sample });
  await waitForAnalysis(page, status);
  const before = await pageState(page);
  assert.equal(before.outputErrorShown, true);
  const reportBefore = await reportFigures(page);

  await page.selectOption('#method', 'gptq');
  await page.waitForSelector('#recipe-message:not([hidden])', { timeout: 120_000 });
  const message = await page.textContent('#recipe-message');
  assert.match(message, /gptq on its 1482752 elements needs about 4\.\d\d GiB of memory beside the tensor's own 5\.7 MiB, and 3\.\d\d GiB are available of the page's 4 GiB; the command-line tool has no such limit/);
  assert.doesNotMatch(await page.textContent('#input-message'), /restarted|reloaded/);
  await shot(page, 'h01-out-of-memory');
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on wide with calibration' });
  assert.equal(await page.isVisible('#fig-output-card'), true, 'the worker keeps the calibration');
  await context.close();
});

/** The page's compute workers (a threaded core adds pool workers of its own). */
function computeWorkers(page) {
  return page.workers().filter((w) => /\/worker\.js$/.test(w.url()));
}

test('a compute worker that dies is replaced, with the tensor, calibration and results', async () => {
  const { page, context } = await withDemoCalibration();
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  const [worker] = computeWorkers(page);
  const ended = new Promise((resolve) => worker.once('close', resolve));
  // An exception outside any request is what the page hears when a worker breaks down
  // (HTML standard: the worker's error event); the worker itself runs on, broken.
  await worker.evaluate(() => { setTimeout(() => { throw new Error('simulated failure inside the worker'); }); });
  await ended;
  await page.waitForFunction(() => /stopped unexpectedly/.test(document.getElementById('input-message').textContent));
  await shot(page, 'h02-worker-died');
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on demo' });
  assert.equal(await page.isVisible('#fig-output-card'), true, 'the fresh worker has the calibration too');
  assert.equal(computeWorkers(page).length, 1, 'one compute worker (its pool workers aside)');
  await context.close();
});

test('a compute worker that stops without a word: the waiting run can be cancelled, nothing lost', async () => {
  const { page, context } = await withDemoCalibration();
  const before = await pageState(page);
  const reportBefore = await reportFigures(page);
  const [worker] = computeWorkers(page);
  const ended = new Promise((resolve) => worker.once('close', resolve));
  // close() from inside ends a worker with no event to the page (HTML standard), so the next
  // run waits; its progress bar offers Cancel.
  await worker.evaluate(() => { setTimeout(() => self.close()); });
  await ended;
  await page.selectOption('#bits', '2');
  await page.waitForSelector('#busy:not([hidden])');
  await page.click('#cancel');
  await page.waitForFunction(() => document.getElementById('status').textContent.startsWith('Cancelled'));
  await shot(page, 'h03-worker-stopped-cancelled');
  await assertNothingLost(page, before, reportBefore, { bits: 3, label: 'int3 asym g128 f16 on demo' });
  await context.close();
});

/** A Content-Security-Policy as { directive: [sources] } (CSP Level 3 serialisation). */
function directives(policy) {
  return Object.fromEntries(policy.split(';').map((d) => d.trim().split(/\s+/)).filter((d) => d[0]).map(([name, ...sources]) => [name, sources]));
}

test('dropping files, analysing and exporting make no network request, and the policy forbids any', async () => {
  const { page, context, requests } = await openPage(browser);
  // The service worker pre-caches the page's files after the first load; let it finish.
  await page.waitForFunction(async () => {
    await navigator.serviceWorker.ready;
    const [name] = await caches.keys();
    return name && (await (await caches.open(name)).keys()).length > 10;
  }, null, { timeout: 30_000 });
  // The recorder hears the compute worker and the service worker, so silence below means something.
  assert.ok(requests.some((u) => u.endsWith('/pkg/bitloupe.js')), 'the compute worker loading its glue was recorded');
  assert.ok(requests.some((u) => u.endsWith('/precache.js')), 'the service worker loading its list was recorded');
  const loaded = requests.length;

  await dropFile(page, 'multi.safetensors', fixture('multi.safetensors'));
  await page.waitForSelector('#tensor-list:not([hidden])');
  let status = await page.textContent('#status');
  await page.click('text=block.0.mlp.up.weight');
  status = await waitForAnalysis(page, status);
  await dropFile(page, 'quant_weight.npy', fixture('quant_weight.npy'));
  status = await waitForAnalysis(page, status);
  const sample = npyF32(64, 300, (i) => Math.sin(i * 0.7) * (i % 300 === 7 ? 30 : 1));
  await dropFile(page, 'acts.npy', sample, '#calib-card');
  status = await waitForAnalysis(page, status);
  assert.match(status, /quant_weight.* with calibration · analysed in/);
  await page.selectOption('#method', 'gptq');
  status = await waitForAnalysis(page, status);
  assert.match(status, /gptq/);
  for (const id of ['#download-report', '#download-markdown', '#download-groups', '#download-npy', '#download-packed', 'button[data-chart="error-map"]:text("PNG")', 'button[data-chart="histogram"]:text("SVG")']) {
    const [download] = await Promise.all([page.waitForEvent('download'), page.click(id)]);
    assert.ok(await download.path(), `${id} downloaded`);
  }
  await page.click('#copy-link');
  await shot(page, 'h04-private');
  assert.deepEqual(requests.slice(loaded), [], 'no request of any kind after the page loaded');

  // The policy: connect-src 'none', and no directive names any other origin.
  const meta = await page.getAttribute('meta[http-equiv="Content-Security-Policy"]', 'content');
  const policy = directives(meta);
  assert.deepEqual(policy['connect-src'], ["'none'"]);
  assert.deepEqual(policy['default-src'], ["'self'"]);
  for (const [name, sources] of Object.entries(policy)) {
    for (const source of sources) {
      assert.ok(["'self'", "'none'", "'unsafe-inline'", "'wasm-unsafe-eval'", 'data:', 'blob:'].includes(source), `${name} allows ${source}`);
    }
  }
  // The server sends the same policy as a header, which is what governs the compute worker; the
  // service worker alone may fetch its own origin, to pre-cache the page for offline use.
  const headerOf = async (file) => (await fetch(new URL(file, URL_UNDER_TEST))).headers.get('content-security-policy');
  assert.equal(await headerOf('./'), meta);
  assert.equal(await headerOf('worker.js'), meta);
  assert.deepEqual(directives(await headerOf('sw.js')), { ...policy, 'connect-src': ["'self'"] });

  // And the browser enforces it: every way of sending bytes is refused, even to the page's own
  // origin, from the page and from the compute worker.
  const attempts = await page.evaluate(async () => {
    const here = `${location.origin}/`;
    const refused = (promise) => promise.then(() => 'sent', () => 'refused');
    const event = (make) => new Promise((resolve) => {
      const target = make();
      target.onload = target.onopen = () => resolve('sent');
      target.onerror = () => resolve('refused');
    });
    const xhr = () => { const r = new XMLHttpRequest(); r.open('POST', here); r.send('x'); return r; };
    return {
      fetch: await refused(fetch(here, { method: 'POST', body: 'x' })),
      xhr: await event(xhr),
      websocket: await event(() => new WebSocket(here.replace(/^http/, 'ws'))),
      eventSource: await event(() => new EventSource(here)),
      // A beacon is queued first and checked later: the violation report tells.
      beacon: await new Promise((resolve) => {
        document.addEventListener('securitypolicyviolation', (e) => resolve(`refused by ${e.effectiveDirective}`), { once: true });
        navigator.sendBeacon(here, 'x');
      }),
    };
  });
  assert.deepEqual(attempts, { fetch: 'refused', xhr: 'refused', websocket: 'refused', eventSource: 'refused', beacon: 'refused by connect-src' });
  const fromWorker = await computeWorkers(page)[0].evaluate(() => fetch(self.location.href).then(() => 'sent', () => 'refused'));
  assert.equal(fromWorker, 'refused');
  await context.close();
});
