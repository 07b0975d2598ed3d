// The threaded core: a pool of web workers on one shared memory, one per core (capped), gives
// exactly the figures of the single-threaded core (the row blocks are merged in row order; see
// crate/src/rows.rs), and is used only where the page is cross-origin isolated.
import { test, after } from 'node:test';
import assert from 'node:assert/strict';
import { launch, openPage, waitForAnalysis, downloadReport, shot } from './harness.mjs';

const browser = await launch();
after(() => browser.close());

/** The demo analysed with `method`, on a page started with `?threads=N`. */
async function demoReport(threads, method) {
  const { page, context } = await openPage(browser, { query: `?threads=${threads}` });
  await page.click('#load-demo-big');
  const status = await waitForAnalysis(page);
  if (method !== 'rtn') {
    await page.selectOption('#method', method);
    await waitForAnalysis(page, status);
  }
  const pool = page.workers().filter((w) => w.url().endsWith('/pool-worker.js')).length;
  const isolated = await page.evaluate(() => self.crossOriginIsolated);
  const report = await downloadReport(page);
  if (threads === 2 && method === 'hqq') await shot(page, 'p01-pool-hqq');
  await context.close();
  return { pool, isolated, report };
}

test('two pool workers give exactly the single-threaded figures, for round to nearest and HQQ', async () => {
  for (const method of ['rtn', 'hqq']) {
    const single = await demoReport(0, method);
    const pooled = await demoReport(2, method);
    assert.equal(single.pool, 0, 'threads=0 runs the single-threaded core');
    assert.equal(pooled.isolated, true, 'the server sends the cross-origin isolation headers');
    assert.equal(pooled.pool, 2, 'two pool workers run beside the compute worker');
    assert.ok(single.report.groups?.mse?.length > 1000 || single.report.mse > 0, 'the report holds figures');
    assert.deepEqual(pooled.report, single.report, `${method}: identical reports`);
  }
});
