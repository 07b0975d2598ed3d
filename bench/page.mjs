// In-browser benchmark of the page in headless Chromium (run by `cargo xtask bench`, which serves
// the built page and sets BITLOUPE_URL). Not a test: it prints figures for the README.
//
// 1. recipe → drawn result: a 4096 × 4096 f32 tensor is opened, then the recipe is switched
//    between 3-bit and 4-bit (g128, asymmetric, f16 scales) several times; the time from the
//    control's change to the painted headline, error map and column profile of the 4-bit runs.
// 2. listing: a 2 GiB `.safetensors` file (128 f16 tensors of 4096 × 2048; sparse on disk) is
//    chosen; the time from choosing it to the painted list of its tensors.
import { mkdirSync, writeFileSync, openSync, ftruncateSync, closeSync, writeSync } from 'node:fs';
import os from 'node:os';
import path from 'node:path';
import { launch, URL_UNDER_TEST } from '../tests/browser/harness.mjs';

const dir = path.join(os.tmpdir(), 'bitloupe-bench');
mkdirSync(dir, { recursive: true });

function npyF32(rows, cols, file) {
  const header = `{'descr': '<f4', 'fortran_order': False, 'shape': (${rows}, ${cols}), }`;
  const padded = header + ' '.repeat(64 - ((10 + header.length + 1) % 64)) + '\n';
  const head = Buffer.alloc(10);
  Buffer.from([0x93, 0x4e, 0x55, 0x4d, 0x50, 0x59, 1, 0]).copy(head);
  head.writeUInt16LE(padded.length, 8);
  const data = new Float32Array(rows * cols);
  let s = 12345;
  for (let i = 0; i < data.length; i++) {
    s = (s * 1103515245 + 12345) >>> 0;
    data[i] = ((s / 2 ** 32) - 0.5) * 0.04;
  }
  writeFileSync(file, Buffer.concat([head, Buffer.from(padded), Buffer.from(data.buffer)]));
}

function sparseSafetensors(file, count, rows, cols) {
  const bytes = rows * cols * 2;
  const header = {};
  for (let i = 0; i < count; i++) {
    header[`model.block.${i}.proj.weight`] = { dtype: 'F16', shape: [rows, cols], data_offsets: [i * bytes, (i + 1) * bytes] };
  }
  const json = Buffer.from(JSON.stringify(header));
  const size = Buffer.alloc(8);
  size.writeBigUInt64LE(BigInt(json.length));
  const fd = openSync(file, 'w');
  writeSync(fd, size);
  writeSync(fd, json);
  ftruncateSync(fd, 8 + json.length + count * bytes);
  closeSync(fd);
}

const median = (xs) => [...xs].sort((a, b) => a - b)[Math.floor(xs.length / 2)];

const weightFile = path.join(dir, 'weight-4096x4096.npy');
const bigFile = path.join(dir, 'checkpoint-2GiB.safetensors');
npyF32(4096, 4096, weightFile);
sparseSafetensors(bigFile, 128, 4096, 2048);

const browser = await launch();
const page = await browser.newPage({ viewport: { width: 1400, height: 1000 } });
await page.goto(URL_UNDER_TEST);
await page.waitForSelector('body[data-ready=true]');
const timings = () => page.evaluate(() => window.bitloupeTimings.slice());
const waitFor = async (what, count) => page.waitForFunction(([w, n]) => window.bitloupeTimings.filter((t) => t.what === w).length >= n, [what, count], { timeout: 120_000 });

await page.setInputFiles('#file-input', weightFile);
await waitFor('open-to-drawn', 1);
const rounds = 7;
for (let i = 0; i < rounds; i++) {
  await page.selectOption('#bits', '3');
  await waitFor('recipe-to-drawn', 2 * i + 1);
  await page.selectOption('#bits', '4');
  await waitFor('recipe-to-drawn', 2 * i + 2);
}
const recipeRuns = (await timings()).filter((t) => t.what === 'recipe-to-drawn').filter((_, i) => i % 2 === 1).map((t) => t.ms);
const openRun = (await timings()).find((t) => t.what === 'open-to-drawn').ms;

const listRuns = [];
for (let i = 0; i < 5; i++) {
  await page.setInputFiles('#file-input', bigFile);
  await waitFor('list', i + 1);
  listRuns.push((await timings()).filter((t) => t.what === 'list')[i].ms);
}
await browser.close();

console.log('| case (headless Chromium) | median | runs |');
console.log('| --- | --- | --- |');
console.log(`| 4096×4096 f32, recipe change to int4 asym g128 f16 → drawn | ${median(recipeRuns).toFixed(0)} ms | ${recipeRuns.map((x) => x.toFixed(0)).join(', ')} |`);
console.log(`| 4096×4096 f32, open file → first drawn result | ${openRun.toFixed(0)} ms | 1 |`);
console.log(`| 2 GiB .safetensors (128 tensors), choose file → list drawn | ${median(listRuns).toFixed(0)} ms | ${listRuns.map((x) => x.toFixed(0)).join(', ')} |`);
