// A link whose recipe the page cannot read: one message, the default recipe, and a page that
// works (README, "Bad inputs").
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import { launch, URL_UNDER_TEST, waitForAnalysis } from './harness.mjs';

let browser;
before(async () => { browser = await launch(); });
after(async () => { await browser?.close(); });

test('a link holding a broken recipe shows one message and the defaults, and the page works', async () => {
  const context = await browser.newContext({ viewport: { width: 1400, height: 1000 } });
  const page = await context.newPage();
  const errors = [];
  page.on('pageerror', (e) => errors.push(e.message));
  // A link cut short while being copied: the recipe's JSON ends in the middle.
  const cut = new URLSearchParams({ recipe: '{"bits":3,"granularity":{"gro', map: 'mse' });
  await page.goto(`${URL_UNDER_TEST}#${cut}`);
  await page.waitForSelector('body[data-ready=true]', { timeout: 30_000 });
  await page.waitForSelector('#recipe-message:not([hidden])');
  assert.equal(await page.textContent('#recipe-message'), 'The link holds a recipe this page cannot read; the defaults are shown.');
  assert.equal(await page.inputValue('#bits'), '4', 'the default recipe (4 bits) is shown');
  await page.click('#load-demo-big');
  const status = await waitForAnalysis(page);
  assert.match(status, /int4 asym g128 f16 on demo/);
  assert.deepEqual(errors, []);
  await context.close();
});
