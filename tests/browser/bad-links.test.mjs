// A link whose recipe the page cannot run: one message, the default recipe on screen (never half
// of the link's), and a page that works (README, "Bad inputs").
import { test, before, after } from 'node:test';
import assert from 'node:assert/strict';
import { launch, URL_UNDER_TEST, waitForAnalysis } from './harness.mjs';

let browser;
before(async () => { browser = await launch(); });
after(async () => { await browser?.close(); });

async function openLink(recipe) {
  const context = await browser.newContext({ viewport: { width: 1400, height: 1000 } });
  const page = await context.newPage();
  const errors = [];
  page.on('pageerror', (e) => errors.push(e.message));
  await page.goto(`${URL_UNDER_TEST}#${new URLSearchParams({ recipe, map: 'mse' })}`);
  await page.waitForSelector('body[data-ready=true]', { timeout: 30_000 });
  return { context, page, errors };
}

/** Every list with choices shows one of them (an unknown value leaves a select blank). */
async function blankSelects(page) {
  return page.$$eval('select', (all) => all.filter((s) => s.options.length > 0 && s.selectedIndex < 0).map((s) => s.id));
}

/** No list left blank, the demo analysed with the recipe on screen (`label`), no page error. */
async function runsTheDemo({ context, page, errors }, label) {
  assert.deepEqual(await blankSelects(page), []);
  await page.click('#load-demo-big');
  assert.match(await waitForAnalysis(page), label);
  assert.deepEqual(errors, []);
  await context.close();
}

const refused = [
  // A link cut short while being copied: the recipe's JSON ends in the middle.
  { why: 'cut short', recipe: '{"bits":3,"granularity":{"gro', message: /^The link's recipe was not applied \(invalid recipe: EOF while parsing .*\); the defaults are shown\.$/ },
  // One readable field beside a broken one: neither is applied.
  { why: 'one field of the wrong type', recipe: '{"bits":3,"damp":"x"}', message: /invalid recipe: invalid type: string "x", expected f32/ },
  { why: 'bits out of range', recipe: '{"bits":99}', message: /invalid recipe: 99 bits is outside 2\.\.=8/ },
  { why: 'an unknown format', recipe: '{"format":"nope"}', message: /invalid recipe: unknown variant `nope`/ },
  { why: 'a combination no analysis accepts', recipe: '{"method":"hqq","symmetric":true}', message: /HQQ fits the zero point/ },
  { why: 'not an object', recipe: '[3]', message: /invalid recipe: a recipe is a JSON object of named fields, such as \{"bits": 3\}/ },
];

for (const { why, recipe, message } of refused) {
  test(`a link whose recipe is ${why} shows one message and the defaults`, async () => {
    const { context, page, errors } = await openLink(recipe);
    await page.waitForSelector('#recipe-message:not([hidden])');
    const text = await page.textContent('#recipe-message');
    assert.match(text, message);
    assert.match(text, /; the defaults are shown\.$/);
    assert.equal(await page.inputValue('#bits'), '4', 'the default 4 bits, not the link\'s');
    assert.equal(await page.inputValue('#format'), 'int');
    assert.equal(await page.inputValue('#granularity'), '128');
    assert.equal(await page.inputValue('#damp'), '0.01');
    await runsTheDemo({ context, page, errors }, /int4 asym g128 f16 on demo/);
  });
}

test('a link with a group size the list lacks adds it to the list and runs it', async () => {
  const { context, page, errors } = await openLink('{"bits":3,"granularity":{"group":96}}');
  assert.equal(await page.isHidden('#recipe-message'), true);
  assert.equal(await page.inputValue('#granularity'), '96');
  assert.equal(await page.inputValue('#bits'), '3');
  await runsTheDemo({ context, page, errors }, /int3 asym g96 f16 on demo/);
});
