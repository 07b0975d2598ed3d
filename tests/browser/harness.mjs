// Shared set-up of the browser tests: Debian's Chromium driven by playwright-core, the page
// served by `cargo xtask test`, screenshots into the folder the test command prints.
import { chromium } from 'playwright-core';
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
export async function openPage(browser, { viewport = { width: 1400, height: 1000 }, colorScheme = 'light' } = {}) {
  const context = await browser.newContext({ viewport, colorScheme });
  const page = await context.newPage();
  const requests = [];
  const errors = [];
  context.on('request', (r) => requests.push(r.url()));
  page.on('pageerror', (e) => errors.push(e.message));
  await page.goto(URL_UNDER_TEST);
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

/** Wait until the status line reports a finished analysis different from `before`. */
export async function waitForAnalysis(page, before = '') {
  await page.waitForFunction((prev) => {
    const s = document.getElementById('status').textContent;
    return s.includes('analysed in') && s !== prev;
  }, before, { timeout: 60_000 });
  return page.textContent('#status');
}

export function sameOrigin(url) {
  const origin = new URL(URL_UNDER_TEST).origin;
  return url.startsWith('data:') || url.startsWith('blob:') || new URL(url).origin === origin;
}
