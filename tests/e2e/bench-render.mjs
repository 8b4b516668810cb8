// Benchmark: how long the Duplicates view takes to render N groups.
//
// The page is served by the real `vitrine serve` (a small store indexed from
// one demo folder); only the duplicates endpoint is answered by Playwright
// with N synthetic groups whose members are real image ids, so thumbnails
// load as usual. Time is measured in the page, from the hash change to the
// second animation frame after the N-th group is in the document.
//
// Run: node tests/e2e/bench-render.mjs   (env: VITRINE_BIN, BENCH_REPEATS)

import fs from 'node:fs';
import os from 'node:os';
import path from 'node:path';

import { indexCollection, launchBrowser, repoRoot, startServer, vitrineBin } from './harness.mjs';

const SIZES = [100, 500, 1000, 2000];
const REPEATS = Number(process.env.BENCH_REPEATS || 5);
const MEMBERS_PER_GROUP = 3;

function syntheticGroups(count, images) {
  const tiers = ['bytes', 'pixels', 'near'];
  return Array.from({ length: count }, (_, g) => {
    const tier = tiers[g % tiers.length];
    return {
      tier,
      members: Array.from({ length: MEMBERS_PER_GROUP }, (_, m) => {
        const image = images[(g * MEMBERS_PER_GROUP + m) % images.length];
        return {
          ...image,
          tier: m === 0 ? 'bytes' : tier,
          similarity: m === 0 ? 1 : 0.99 - m * 0.01,
          keeper: m === 0,
          check: m > 0 && tier === 'near' ? { status: 'confirmed', score: 0.9 } : null,
        };
      }),
    };
  });
}

function median(values) {
  const sorted = [...values].sort((a, b) => a - b);
  const mid = Math.floor(sorted.length / 2);
  return sorted.length % 2 ? sorted[mid] : (sorted[mid - 1] + sorted[mid]) / 2;
}

const store = fs.mkdtempSync(path.join(os.tmpdir(), 'vitrine-bench-store-'));
const folder = path.join(repoRoot, 'demo-images', 'train', 'mug');
await indexCollection(vitrineBin, store, folder);
const server = await startServer(vitrineBin, store);
const browser = await launchBrowser();
const { page } = browser;
try {
  const collections = await (await fetch(`${server.url}/api/v1/collections`)).json();
  const name = collections.collections[0].name;
  const listing = await (await fetch(`${server.url}/api/v1/collections/${encodeURIComponent(name)}/images?per_page=500`)).json();
  const images = listing.items.map(({ id, path: p, root, split, label, width, height, byte_size }) => ({ id, path: p, root, split, label, width, height, byte_size }));

  let body = '';
  await page.route('**/api/v1/collections/*/duplicates*', (route) => route.fulfill({ contentType: 'application/json', body }));
  await page.goto(`${server.url}/#/search`);
  await page.waitForSelector('h1');

  const rows = [];
  for (const size of SIZES) {
    const groups = syntheticGroups(size, images);
    body = JSON.stringify({ total: size, groups });
    const times = [];
    for (let run = 0; run < REPEATS; run += 1) {
      await page.evaluate(() => { location.hash = '#/search'; });
      await page.waitForSelector('[data-testid="dropzone"]');
      const ms = await page.evaluate(async ({ size: n, run: r }) => {
        const start = performance.now();
        location.hash = `#/duplicates?per_page=${n}&run=${r}`;
        await new Promise((resolve) => {
          const check = () => {
            if (document.querySelectorAll('[data-testid="groups"] .group').length === n) resolve();
            else requestAnimationFrame(check);
          };
          check();
        });
        await new Promise((resolve) => requestAnimationFrame(() => requestAnimationFrame(resolve)));
        return performance.now() - start;
      }, { size, run });
      times.push(ms);
    }
    const heap = await page.evaluate(() => (performance.memory ? performance.memory.usedJSHeapSize : 0));
    rows.push({ groups: size, images: size * MEMBERS_PER_GROUP, median: median(times), min: Math.min(...times), max: Math.max(...times), heapMiB: heap / 2 ** 20 });
  }

  console.log(`\nDuplicates view: time from hash change to N groups painted (${REPEATS} runs each, headless Chromium, ${os.cpus().length} cores)\n`);
  console.log('| groups | image cards | median ms | min ms | max ms | JS heap MiB |');
  console.log('|-------:|------------:|----------:|-------:|-------:|------------:|');
  for (const r of rows) {
    console.log(`| ${r.groups} | ${r.images} | ${r.median.toFixed(0)} | ${r.min.toFixed(0)} | ${r.max.toFixed(0)} | ${r.heapMiB.toFixed(1)} |`);
  }
} finally {
  await browser.close();
  await server.stop();
  fs.rmSync(store, { recursive: true, force: true });
}
