// End-to-end check of the page served by `vitrine serve`, in real headless
// Chromium (Debian's package) driven by playwright-core.
//
// It builds nothing: the binary comes from $VITRINE_BIN (default
// target/debug/vitrine) and the default model must already be fetched
// (`vitrine model fetch`). The expected answers come from
// demo-images/ground-truth.json, written by the demo generator when it planted
// the copies, not from vitrine's own code.
//
// Run: npm ci --prefix tests/e2e && node --test tests/e2e/

import { after, before, test } from 'node:test';
import assert from 'node:assert/strict';
import fs from 'node:fs';
import os from 'node:os';
import path from 'node:path';

import { bmpFile, tiffFile } from './image-files.mjs';
import {
  artifactsDir,
  assertLoopbackOnly,
  indexCollection,
  launchBrowser,
  repoRoot,
  startServer,
  vitrineBin,
} from './harness.mjs';

const demoDir = path.join(repoRoot, 'demo-images');
const truth = JSON.parse(fs.readFileSync(path.join(demoDir, 'ground-truth.json'), 'utf8'));

let store;
let server;
let browser;
let page;
const requests = [];
const pageErrors = [];

/** The API address of the served collection's `suffix`. */
async function collectionUrl(suffix) {
  const collections = await (await fetch(`${server.url}/api/v1/collections`)).json();
  return `${server.url}/api/v1/collections/${encodeURIComponent(collections.collections[0].name)}${suffix}`;
}

/**
 * Waits until the service has a whole-collection answer ready. The first
 * verified report decodes every image of a candidate pair (the service starts
 * on it when it starts; the page shows its loading state meanwhile).
 */
async function untilAnswered(suffix, limitMs = 300000) {
  const url = await collectionUrl(suffix);
  const started = Date.now();
  for (;;) {
    const response = await fetch(url);
    if (response.ok) return;
    if (Date.now() - started > limitMs) throw new Error(`${suffix} still unanswered after ${limitMs} ms: ${response.status}`);
    await new Promise((resolve) => setTimeout(resolve, 1000));
  }
}

/** Every planted file mapped to its set of copies of one picture (union-find over the ground truth's links). */
function plantedSets() {
  const parent = new Map();
  const find = (x) => {
    if (!parent.has(x)) parent.set(x, x);
    while (parent.get(x) !== x) x = parent.get(x);
    return x;
  };
  const join = (a, b) => parent.set(find(a), find(b));
  for (const group of [...truth.exact_duplicates, ...truth.pixel_identical_reencodings]) {
    group.files.forEach((f) => join(group.files[0], f));
  }
  for (const pair of truth.near_duplicates) join(pair.original, pair.edited);
  for (const leak of truth.leaks) join(leak.leaked, leak.train_counterpart);
  return new Map(Array.from(parent.keys(), (f) => [f, find(f)]));
}

/** A planted near-duplicate whose original is in no other planted group, so its nearest other image is unambiguous. */
function searchCase() {
  const elsewhere = new Set([
    ...truth.exact_duplicates.flatMap((g) => g.files),
    ...truth.pixel_identical_reencodings.flatMap((g) => g.files),
    ...truth.leaks.flatMap((l) => [l.leaked, l.train_counterpart]),
  ]);
  const candidates = truth.near_duplicates.filter((n) => !elsewhere.has(n.original) && !elsewhere.has(n.edited));
  // A re-encoded JPEG is the mildest planted edit.
  return candidates.find((n) => n.edit === 'jpeg-reencode') || candidates[0];
}

/** A demo image the generator made no copy of: no other indexed image looks more like it than itself. */
function uncopiedImage() {
  const planted = plantedSets();
  const broken = new Set(truth.broken.map((b) => b.path));
  return truth.files.map((f) => f.path).find((p) => !planted.has(p) && !broken.has(p));
}

/** An indexed image's pixels as the browser decodes its thumbnail: { width, height, rgba }. */
async function thumbnailPixels(file) {
  const listing = await (await fetch(await collectionUrl(`/images?prefix=${encodeURIComponent(file)}`))).json();
  const { id } = listing.items.find((item) => item.path === file);
  const jpeg = Buffer.from(await (await fetch(await collectionUrl(`/images/${id}/thumbnail?size=320`))).arrayBuffer());
  return page.evaluate(async (base64) => {
    const bytes = Uint8Array.from(atob(base64), (c) => c.charCodeAt(0));
    const bitmap = await createImageBitmap(new Blob([bytes], { type: 'image/jpeg' }));
    const context = new OffscreenCanvas(bitmap.width, bitmap.height).getContext('2d');
    context.drawImage(bitmap, 0, 0);
    const { width, height, data } = context.getImageData(0, 0, bitmap.width, bitmap.height);
    return { width, height, rgba: Array.from(data) };
  }, jpeg.toString('base64'));
}

/** Opens Search, lets `give` hand it a file; resolves with the paths of the hits, failing on an error shown instead. */
async function searchWithUpload(give) {
  await page.goto(`${server.url}/#/search`);
  await page.waitForSelector('[data-testid="dropzone"]');
  await give();
  await page.waitForSelector('[data-testid="hits"] .card, .results [data-state="error"]');
  const error = await page.$('.results [data-state="error"]');
  assert.equal(error && await error.textContent(), null, 'the upload is searched with');
  return paths('[data-testid="hits"] .card');
}

/** Drops a file without a MIME type on the drop zone, as browsers do with formats they do not know; resolves with its type. */
async function dropUntyped(name, buffer) {
  return page.evaluate(({ fileName, base64 }) => {
    const bytes = Uint8Array.from(atob(base64), (c) => c.charCodeAt(0));
    const transfer = new DataTransfer();
    transfer.items.add(new File([bytes], fileName));
    const zone = document.querySelector('[data-testid="dropzone"]');
    zone.dispatchEvent(new DragEvent('drop', { dataTransfer: transfer, bubbles: true, cancelable: true }));
    return transfer.files[0].type;
  }, { fileName: name, base64: buffer.toString('base64') });
}

/** Which view the page shows once it settles on one: 'search', or 'missing' for its page-does-not-exist notice. */
async function settledView() {
  const shown = await page.waitForFunction(() => {
    if (document.querySelector('#view [data-testid="dropzone"]')) return 'search';
    const notice = document.querySelector('#view [data-state="empty"] h2');
    return notice && notice.textContent === 'This page does not exist.' ? 'missing' : null;
  });
  return shown.jsonValue();
}

/** Where the leak pairs and their list sit on screen: { list: {left, right}, pairs: [{top, left, right}] } in page order. */
async function leakBoxes() {
  return page.$eval('[data-testid="leaks"]', (list) => {
    const box = (el) => {
      const r = el.getBoundingClientRect();
      return { top: Math.round(r.top), left: Math.round(r.left), right: Math.round(r.right) };
    };
    return { list: box(list), pairs: Array.from(list.children, box) };
  });
}

/** Saves a screenshot once the images on screen have loaded. */
async function shot(name) {
  await page.waitForFunction(() => Array.from(document.images)
    .filter((img) => {
      const r = img.getBoundingClientRect();
      return r.bottom > 0 && r.top < window.innerHeight && r.width > 0;
    })
    .every((img) => img.complete));
  await page.screenshot({ path: path.join(artifactsDir, `${name}.png`), fullPage: false });
}

async function paths(selector) {
  return page.$$eval(selector, (els) => els.map((el) => el.dataset.path));
}

before(async () => {
  fs.mkdirSync(artifactsDir, { recursive: true });
  // VITRINE_E2E_STORE: an already indexed copy of demo-images, to skip
  // indexing while working on the page. The tests serve a copy of it: they
  // record decisions, and each run must start from none.
  store = fs.mkdtempSync(path.join(os.tmpdir(), 'vitrine-e2e-store-'));
  if (process.env.VITRINE_E2E_STORE) fs.cpSync(process.env.VITRINE_E2E_STORE, store, { recursive: true });
  else await indexCollection(vitrineBin, store, demoDir);
  server = await startServer(vitrineBin, store);
  browser = await launchBrowser();
  page = browser.page;
  page.on('request', (request) => requests.push(request.url()));
  page.on('pageerror', (err) => pageErrors.push(err.message));
}, { timeout: 30 * 60 * 1000 });

after(async () => {
  if (browser) await browser.close();
  if (server) await server.stop();
  if (store) fs.rmSync(store, { recursive: true, force: true });
});

test('search: an uploaded original finds its planted near-duplicate first', async () => {
  const planted = searchCase();
  assert.ok(planted, 'ground truth lists a near-duplicate to search for');
  await page.goto(`${server.url}/#/search`);
  await page.waitForSelector('[data-testid="browse"] .card');
  await page.setInputFiles('#query-file', path.join(demoDir, planted.original));
  await page.waitForSelector('[data-testid="hits"] .card');
  const hits = await paths('[data-testid="hits"] .card');
  const others = hits.filter((p) => p !== planted.original);
  // Ground truth: `edited` was made from `original` by the demo generator.
  assert.equal(others[0], planted.edited, `first result other than the query itself; got ${hits.slice(0, 5).join(', ')}`);
  const firstScore = await page.$eval('[data-testid="hits"] .card .score', (el) => el.textContent);
  assert.match(firstScore, /\d\.\d{3}/, 'each hit shows its similarity');
  const alt = await page.$eval('[data-testid="hits"] .card img', (el) => el.alt);
  assert.match(alt, /split .+, label .+/, 'thumbnails carry path, split and label as alt text');
  await shot('search');
});

test('search: a BMP upload finds the indexed image it was made from', async () => {
  const source = uncopiedImage();
  const { width, height, rgba } = await thumbnailPixels(source);
  const bmp = { name: 'query.bmp', mimeType: 'image/bmp', buffer: bmpFile(width, height, rgba) };
  const hits = await searchWithUpload(() => page.setInputFiles('#query-file', bmp));
  assert.equal(hits[0], source, `first hit; got ${hits.slice(0, 3).join(', ')}`);
  const accept = (await page.getAttribute('#query-file', 'accept')).split(',');
  for (const type of ['image/gif', 'image/bmp', 'image/tiff']) assert.ok(accept.includes(type), `the file picker offers ${type}`);
});

test('search: a dropped TIFF without a MIME type is taken by its file name', async () => {
  const source = uncopiedImage();
  const { width, height, rgba } = await thumbnailPixels(source);
  let type;
  const hits = await searchWithUpload(async () => { type = await dropUntyped('query.tif', tiffFile(width, height, rgba)); });
  assert.equal(type, '', 'the dropped file has no type');
  assert.equal(hits[0], source, `first hit; got ${hits.slice(0, 3).join(', ')}`);
  // Chromium does not display TIFF: the preview says so rather than showing a broken image.
  await page.waitForSelector('.query-preview [data-testid="no-preview"]');
});

test('routing: "#/" opens the search view, on load and on a hash change', async () => {
  await page.goto('about:blank');
  await page.goto(`${server.url}/#/`);
  assert.equal(await settledView(), 'search', 'a page opened at #/');
  assert.equal(await page.getAttribute('.views a[data-view="search"]', 'aria-current'), 'page');
  await page.evaluate(() => { location.hash = '#/clusters'; });
  await page.waitForSelector('#view [data-testid="dropzone"]', { state: 'detached' });
  await page.evaluate(() => { location.hash = '#/'; });
  assert.equal(await settledView(), 'search', 'a hash changed to #/');
});

test('duplicates: a planted exact-copy group is shown with one suggested keeper', async () => {
  await untilAnswered('/duplicates?per_page=1');
  await page.goto(`${server.url}/#/duplicates?per_page=500`);
  await page.waitForSelector('[data-testid="groups"] .group');
  const groups = await page.$$eval('[data-testid="groups"] .group', (els) => els.map((el) => ({
    paths: Array.from(el.querySelectorAll('.card')).map((c) => c.dataset.path),
    keepers: el.querySelectorAll('.card.is-keeper').length,
    tier: el.dataset.tier,
  })));
  // Byte-identical copies and pixel-identical re-encodings group at any threshold.
  for (const planted of [...truth.exact_duplicates, ...truth.pixel_identical_reencodings]) {
    const shown = groups.find((g) => planted.files.every((f) => g.paths.includes(f)));
    assert.ok(shown, `planted group ${planted.files.join(' + ')} is shown`);
    assert.equal(shown.keepers, 1, 'exactly one member is marked as the suggested keeper');
  }

  // Keyboard review: j moves to the next group, k back.
  await page.focus('[data-testid="groups"] .group');
  await page.keyboard.press('j');
  assert.equal(await page.evaluate(() => document.activeElement.getAttribute('aria-labelledby')), 'group-2');
  await page.keyboard.press('k');
  assert.equal(await page.evaluate(() => document.activeElement.getAttribute('aria-labelledby')), 'group-1');

  // Export of the current view, as the browser downloads it.
  const [download] = await Promise.all([page.waitForEvent('download'), page.click('[data-export="csv"]')]);
  const csv = fs.readFileSync(await download.path(), 'utf8');
  assert.ok(csv.startsWith('group,group_tier,id,path'), 'CSV has its header');
  for (const file of truth.exact_duplicates[0].files) assert.ok(csv.includes(file), `CSV lists ${file}`);

  // Verified (the default): every group shown lies within one planted set of
  // copies. By cosine alone the look-alike product shots of this catalogue
  // chain together; the check of each pair is what keeps them apart.
  const planted = plantedSets();
  for (const group of groups) {
    const sets = new Set(group.paths.map((p) => planted.get(p)));
    assert.ok(!sets.has(undefined) && sets.size === 1, `group ${group.paths.join(' + ')} holds only planted copies of one picture`);
  }
  assert.match(await page.textContent('[data-testid="duplicates-summary"]'), /Near pairs verified: \d+ of \d+ candidate pairs confirmed/);
  await shot('duplicates');
});

test('duplicates: the threshold control re-queries the groups', async () => {
  const planted = searchCase();
  const groupPaths = () => page.$$eval('[data-testid="groups"] .group', (els) => els.map((el) =>
    Array.from(el.querySelectorAll('.card')).map((c) => c.dataset.path)));
  const holdsPair = (groups) => groups.some((g) => g.includes(planted.original) && g.includes(planted.edited));

  await page.goto(`${server.url}/#/duplicates?candidate_threshold=0.900&per_page=500`);
  await page.waitForSelector('[data-testid="groups"][data-threshold="0.900"] .group');
  const loose = await groupPaths();
  assert.ok(holdsPair(loose), `checked from 0.900 the planted ${planted.edit} pair forms a group`);

  // The slider moved to its top end with the keyboard: only pairs with identical embeddings are checked.
  await page.focus('#threshold');
  await page.keyboard.press('End');
  await page.waitForSelector('[data-testid="groups"][data-threshold="1.000"] .group');
  const strict = await groupPaths();
  // Ground truth: a re-encoded or edited copy differs in pixels, so its embedding is not identical.
  assert.ok(!holdsPair(strict), 'at 1.000 the edited pair is no longer grouped');
  for (const group of truth.exact_duplicates) {
    assert.ok(strict.some((g) => group.files.every((f) => g.includes(f))), `byte-identical ${group.files[0]} stays grouped at any threshold`);
  }
});

test('leakage: a planted leak is shown as a pair with the per-split summary', async () => {
  await untilAnswered('/leaks?per_page=1');
  await page.goto(`${server.url}/#/leakage?per_page=200`);
  await page.waitForSelector('[data-testid="leaks"] .review-item');
  const pairs = await page.$$eval('[data-testid="leaks"] .review-item', (els) => els.map((el) => [el.dataset.path, el.dataset.counterpart]));
  const found = truth.leaks.filter((l) => pairs.some(([a, b]) => a === l.leaked && b === l.train_counterpart));
  assert.ok(found.length >= 1, `at least one planted leak is listed (pairs: ${pairs.length})`);
  const exact = truth.leaks.filter((l) => l.kind === 'exact-copy');
  for (const leak of exact) {
    assert.ok(found.includes(leak), `byte-identical leak ${leak.leaked} is listed`);
  }
  const summarySplits = await page.$$eval('[data-testid="leak-summary"] tbody th', (els) => els.map((el) => el.textContent));
  for (const leak of found) assert.ok(summarySplits.includes(leak.leaked.split('/')[0]), 'the summary has a row for the leaked split');
  await page.goto(`${server.url}/#/leakage`);
  await page.waitForSelector('[data-testid="leaks"] .review-item');
  await shot('leakage');
});

test('leakage: pairs share rows on a wide screen and stack on a narrow one', async () => {
  await untilAnswered('/leaks?per_page=1');
  try {
    await page.setViewportSize({ width: 1600, height: 900 });
    await page.goto(`${server.url}/#/leakage`);
    await page.waitForSelector('[data-testid="leaks"] .review-item');
    const wide = await leakBoxes();
    // Ground truth: the demo generator planted several leaks.
    assert.ok(wide.pairs.length >= 2, `at least two pairs are listed (${wide.pairs.length})`);
    assert.equal(wide.pairs[1].top, wide.pairs[0].top, 'the first two pairs share a row at 1600 px');
    const firstRow = wide.pairs.filter((p) => p.top === wide.pairs[0].top);
    assert.equal(firstRow[0].left, wide.list.left, 'the first row starts at the list\'s left edge');
    assert.ok(Math.abs(firstRow[firstRow.length - 1].right - wide.list.right) <= 1,
      `the first row reaches the list's right edge (${firstRow[firstRow.length - 1].right} of ${wide.list.right})`);
    await shot('leakage-wide');

    await page.setViewportSize({ width: 500, height: 900 });
    const narrow = await leakBoxes();
    assert.ok(narrow.pairs.every((p, i) => i === 0 || p.top > narrow.pairs[i - 1].top),
      `one pair per row at 500 px (tops ${narrow.pairs.map((p) => p.top).join(', ')})`);
    assert.ok(narrow.pairs.every((p) => p.right <= narrow.list.right) && narrow.list.right <= 500, 'no pair runs off a 500 px screen');
  } finally {
    await page.setViewportSize({ width: 1360, height: 900 });
  }
});

test('clusters: the overview lists clusters and one opens with its members', async () => {
  await page.goto(`${server.url}/#/clusters`);
  await page.waitForSelector('[data-testid="clusters"] .cluster');
  const clusters = await page.$$eval('[data-testid="clusters"] .cluster', (els) => els.map((el) => ({
    index: el.dataset.index,
    size: Number(el.querySelector('.size').textContent.match(/\d+/)[0]),
  })));
  const total = clusters.reduce((sum, c) => sum + c.size, 0);
  const indexed = truth.files.length - truth.broken.length;
  assert.equal(total, indexed, 'every indexed image is in exactly one cluster');
  await shot('clusters');

  const first = clusters[0];
  await page.click(`[data-open="${first.index}"]`);
  await page.waitForSelector('[data-testid="cluster-members"] .card');
  const members = await page.$$eval('[data-testid="cluster-members"] .card', (els) => els.length);
  assert.equal(members, Math.min(first.size, 60), 'the opened cluster shows its members (first page)');
  await shot('cluster');
});

test('image detail: metadata, neighbours and label suggestion', async () => {
  const planted = searchCase();
  await page.goto(`${server.url}/#/search`);
  await page.fill('#filter-prefix', planted.original);
  await page.press('#filter-prefix', 'Enter');
  await page.waitForSelector(`[data-testid="browse"] .card[data-path="${planted.original}"]`);
  await page.click(`[data-testid="browse"] .card[data-path="${planted.original}"] .thumb-link`);
  await page.waitForSelector('[data-testid="neighbours"] .card');
  const heading = await page.textContent('h1');
  assert.equal(heading, planted.original);
  const neighbours = await paths('[data-testid="neighbours"] .card');
  assert.equal(neighbours[0], planted.edited, 'the nearest neighbour of the original is its planted edit');
  await page.waitForSelector('[data-testid="suggestion"]');

  // Unlabelled images: a suggested label, when one is shown, is the label the
  // demo generator rendered them as (ground truth `unlabelled[].true_label`).
  const ids = new Map((await page.evaluate(async () => {
    const name = document.getElementById('collection-select').value;
    const data = await (await fetch(`/api/v1/collections/${encodeURIComponent(name)}/images?prefix=unsorted/&per_page=100`)).json();
    return data.items.map((item) => [item.path, item.id]);
  })));
  let shown = 0;
  for (const { path: file, true_label: truthLabel } of truth.unlabelled) {
    await page.goto(`${server.url}/#/image/${ids.get(file)}`);
    // The previous image's page stays until this one's metadata arrives.
    await page.waitForFunction((expected) => document.querySelector('h1')?.textContent === expected &&
      document.querySelector('[data-testid="suggestion"]'), file);
    const suggested = await page.getAttribute('[data-testid="suggestion"]', 'data-suggested');
    if (!suggested) continue;
    assert.equal(suggested, truthLabel, `suggestion for ${file}`);
    if (shown === 0) await shot('image');
    shown += 1;
  }
  assert.ok(shown >= 1, 'at least one unlabelled image gets a suggestion');
});

test('duplicates: a page of 1,000 groups renders and stays navigable by keyboard', async (t) => {
  // Only the duplicates answer is synthetic (Playwright answers it); the page,
  // the other endpoints and the thumbnails come from the real service.
  const collections = await (await fetch(`${server.url}/api/v1/collections`)).json();
  const name = collections.collections[0].name;
  const listing = await (await fetch(`${server.url}/api/v1/collections/${encodeURIComponent(name)}/images?per_page=300`)).json();
  const images = listing.items;
  const count = 1000;
  const groups = Array.from({ length: count }, (_, g) => ({
    tier: 'near',
    members: [0, 1, 2].map((m) => ({
      ...images[(3 * g + m) % images.length], tier: m ? 'near' : 'bytes', similarity: m ? 0.95 : 1, keeper: m === 0,
    })),
  }));
  const body = JSON.stringify({ threshold: 0.9, total: count, page: 1, per_page: count, groups });
  const pattern = '**/api/v1/collections/*/duplicates*';
  await page.route(pattern, (route) => route.fulfill({ contentType: 'application/json', body }));
  try {
    await page.goto(`${server.url}/#/search`);
    await page.waitForSelector('[data-testid="dropzone"]');
    const ms = await page.evaluate(async (n) => {
      const start = performance.now();
      location.hash = `#/duplicates?per_page=${n}`;
      await new Promise((resolve) => {
        const check = () => (document.querySelectorAll('[data-testid="groups"] .group').length === n ? resolve() : requestAnimationFrame(check));
        check();
      });
      await new Promise((resolve) => requestAnimationFrame(() => requestAnimationFrame(resolve)));
      return performance.now() - start;
    }, count);
    // A figure to read, not a pass mark; tests/e2e/bench-render.mjs prints the table.
    t.diagnostic(`1,000 duplicate groups rendered in ${ms.toFixed(0)} ms`);
    const keepers = await page.$$eval('[data-testid="groups"] .card.is-keeper', (els) => els.length);
    assert.equal(keepers, count, 'each synthetic group shows its keeper');
    await page.focus('[data-testid="groups"] .group[aria-labelledby="group-999"]');
    await page.keyboard.press('j');
    assert.equal(await page.evaluate(() => document.activeElement.getAttribute('aria-labelledby')), 'group-1000');
    assert.ok(await page.evaluate(() => {
      const r = document.activeElement.getBoundingClientRect();
      return r.top >= 0 && r.top < window.innerHeight;
    }), 'the focused group is scrolled into view');
  } finally {
    await page.unroute(pattern);
  }
});

// ------------------------------------------------------------ decisions
// The tests below record decisions, so they come after every test that reads
// the undecided reports. Expected values come from ground-truth.json and the
// demo folder; what they decided is kept here for the training-list checks.

const decided = {
  /** Planted exact-duplicate group (its `files`) -> the one file kept. */
  keepers: new Map(),
  /** Evaluated copies of planted leaks that were dropped. */
  droppedLeaks: [],
  /** path -> label given in the Labels view. */
  labels: new Map(),
};

function sameFiles(a, b) {
  return a.length === b.length && a.every((f) => b.includes(f));
}

/** The progress line's counts: "N of M … decided". */
async function progressCounts() {
  const text = await page.textContent('#view [data-testid="progress"]');
  const counts = text.match(/^(\d+) of (\d+) /);
  assert.ok(counts, `the progress line reads "N of M …": ${text}`);
  return { decided: Number(counts[1]), all: Number(counts[2]), text };
}

/**
 * Waits until the decision a key press started is recorded and shown. The
 * page marks the list busy from the key press until it shows the refreshed
 * report, so this waits for a condition, not for time.
 */
async function untilSettled() {
  await page.waitForFunction(() => !document.querySelector('#view [aria-busy]'));
  const notice = await page.$('#view [data-testid="decision-notice"]:not([hidden])');
  assert.equal(notice && await notice.textContent(), null, 'no decision was refused');
}

/**
 * Loads the page afresh at `hash`: a new document, so nothing of the view
 * shown before can be taken for the new one.
 */
async function openView(hash) {
  await page.goto('about:blank');
  await page.goto(`${server.url}/${hash}`);
}

/** Runs `action`, which opens another view, and waits until that view has asked for `urlPart` and shows its answer. */
async function untilViewShown(urlPart, action) {
  await Promise.all([page.waitForResponse((response) => response.url().includes(urlPart)), action()]);
  await page.waitForFunction(() => !document.querySelector('#view [aria-busy]') && document.querySelector('#view [data-testid="progress"]')?.textContent);
}

/** The review item that has focus, as the page shows it. */
async function focusedItem() {
  return page.evaluate(() => {
    const item = document.activeElement && document.activeElement.closest('.review-item');
    if (!item) return null;
    const cards = Array.from(item.querySelectorAll('.card'));
    const next = item.parentElement.nextElementSibling;
    return {
      heading: item.getAttribute('aria-labelledby'),
      key: item.dataset.item,
      next: next && next.firstElementChild.dataset.item,
      path: item.dataset.path,
      counterpart: item.dataset.counterpart,
      paths: cards.map((c) => c.dataset.path),
      keeper: item.querySelector('.card.is-keeper')?.dataset.path ?? null,
      last: !next,
    };
  });
}

/** The shown state of the review item holding `file`: decided flag and each image's decision. */
async function itemState(file) {
  return page.$$eval('#view .review-item', (items, wanted) => {
    const item = items.find((el) => Array.from(el.querySelectorAll('.card')).some((c) => c.dataset.path === wanted));
    if (!item) return null;
    const cards = Array.from(item.querySelectorAll('.card'));
    return {
      decided: item.dataset.decided === 'true',
      chip: Boolean(item.querySelector('header .chip.decided')),
      decisions: Object.fromEntries(cards.map((c) => [c.dataset.path, c.dataset.decision || null])),
    };
  }, file);
}

/** Steps with j through the review list until `wanted(focusedItem)` holds; fails at the list's end. */
async function stepTo(wanted, what) {
  for (;;) {
    const item = await focusedItem();
    assert.ok(item, 'a review item has focus');
    if (wanted(item)) return item;
    assert.ok(!item.last, `${what} is reached before the end of the list`);
    await page.keyboard.press('j');
    await page.waitForFunction((heading) => document.activeElement.getAttribute('aria-labelledby') !== heading, item.heading);
  }
}

test('decisions: planted exact copies are settled with the keyboard; u undoes the last decision', async () => {
  await openView('#/duplicates?per_page=500');
  await page.waitForSelector('[data-testid="groups"] .group');
  const start = await progressCounts();
  assert.equal(start.decided, 0, 'no group is decided before');
  await page.focus('[data-testid="groups"] .group');

  const remaining = truth.exact_duplicates.map((group) => group.files);
  let last = null;
  while (remaining.length) {
    const item = await stepTo((i) => remaining.some((files) => sameFiles(files, i.paths)), 'every planted group');
    const files = remaining.find((f) => sameFiles(f, item.paths));
    await page.keyboard.press('a');
    await untilSettled();
    remaining.splice(remaining.indexOf(files), 1);

    const progress = await progressCounts();
    assert.equal(progress.decided, start.decided + truth.exact_duplicates.length - remaining.length, `progress counts up: ${progress.text}`);
    assert.equal(progress.all, start.all, 'the groups in all stay the same');
    await page.waitForFunction((text) => document.getElementById('announcer').textContent.includes(text), progress.text);
    const shown = await itemState(files[0]);
    assert.ok(shown.decided && shown.chip, `group ${files.join(' + ')} is shown decided`);
    const kept = files.filter((f) => shown.decisions[f] === 'keep');
    assert.deepEqual(kept, [item.keeper], 'the suggested keeper is kept');
    for (const file of files.filter((f) => f !== item.keeper)) assert.equal(shown.decisions[file], 'drop', `${file} is dropped`);
    decided.keepers.set(files, item.keeper);
    if (!item.last) assert.equal((await focusedItem()).key, item.next, 'focus moves on to the next group');
    last = { files, keeper: item.keeper };
  }

  // u takes back the latest decision: one drop of the last group, which is then open again.
  const before = await progressCounts();
  await page.keyboard.press('u');
  await untilSettled();
  assert.equal((await progressCounts()).decided, before.decided - 1, 'undo counts down');
  const reverted = await itemState(last.files[0]);
  assert.ok(!reverted.decided && !reverted.chip, 'the last group is open again');
  assert.equal(last.files.filter((f) => reverted.decisions[f] === 'drop').length, last.files.length - 2, 'one drop is taken back');
  const refocused = await focusedItem();
  assert.ok(sameFiles(refocused.paths, last.files), 'focus is on the group the undone decision was about');

  // And decided again.
  await page.keyboard.press('a');
  await untilSettled();
  assert.equal((await progressCounts()).decided, before.decided, 'decided again');
  assert.ok((await itemState(last.files[0])).decided);
  await shot('duplicates-decided');
});

test('decisions: planted leaks are settled with the keyboard by dropping the evaluated copy', async () => {
  await openView('#/leakage?per_page=200');
  await page.waitForSelector('[data-testid="leaks"] .review-item');
  const start = await progressCounts();
  // Ground truth: no file is in more than one planted case, so the groups settled above touched no leak.
  assert.equal(start.decided, 0, 'no leak is decided before');
  const listed = await page.$$eval('[data-testid="leaks"] .review-item', (els) => els.map((el) => `${el.dataset.path} ${el.dataset.counterpart}`));
  const planted = truth.leaks.filter((l) => listed.includes(`${l.leaked} ${l.train_counterpart}`));
  for (const leak of truth.leaks.filter((l) => l.kind === 'exact-copy')) assert.ok(planted.includes(leak), `byte-identical leak ${leak.leaked} is listed`);

  await page.focus('[data-testid="leaks"] .review-item');
  const remaining = [...planted];
  while (remaining.length) {
    const item = await stepTo((i) => remaining.some((l) => l.leaked === i.path && l.train_counterpart === i.counterpart), 'every planted leak');
    const leak = remaining.find((l) => l.leaked === item.path);
    await page.keyboard.press('e');
    await untilSettled();
    remaining.splice(remaining.indexOf(leak), 1);
    decided.droppedLeaks.push(leak.leaked);

    const progress = await progressCounts();
    assert.equal(progress.decided, planted.length - remaining.length, `progress counts up: ${progress.text}`);
    assert.equal(progress.all, start.all);
    const shown = await itemState(leak.leaked);
    assert.ok(shown.decided && shown.chip, `leak ${leak.leaked} is shown decided`);
    assert.equal(shown.decisions[leak.leaked], 'drop', 'the evaluated copy is dropped');
    assert.equal(shown.decisions[leak.train_counterpart], null, 'the reference copy is left alone');
    if (!item.last) assert.equal((await focusedItem()).key, item.next, 'focus moves on to the next pair');
  }

  // "Still to review" asks for the open leaks only: the settled ones leave the list, the count stays.
  await untilViewShown('undecided=true', () => page.check('#undecided'));
  const open = await page.$$eval('#view .review-item', (els) => els.map((el) => el.dataset.path));
  for (const file of decided.droppedLeaks) assert.ok(!open.includes(file), `${file} is no longer listed`);
  const progress = await progressCounts();
  assert.equal(progress.decided, planted.length);
  assert.equal(progress.all, start.all);
  await shot('leakage-decided');
});

test('decisions: a decision recorded elsewhere meanwhile is refused and the view shows the current state', async () => {
  const planted = searchCase();
  await openView('#/duplicates?per_page=500');
  await page.waitForSelector('[data-testid="groups"] .group');
  const group = await page.$$eval('[data-testid="groups"] .group', (els, file) => {
    const el = els.find((g) => Array.from(g.querySelectorAll('.card')).some((c) => c.dataset.path === file));
    return el && { heading: el.getAttribute('aria-labelledby'), keeper: el.querySelector('.card.is-keeper').dataset.path };
  }, planted.original);
  assert.ok(group, `the planted ${planted.edit} pair is a group`);
  const before = await progressCounts();

  // Another reviewer keeps the keeper after this page loaded the group.
  const { key } = await (await fetch(`${server.url}/api/v1/page-key`)).json();
  const recorded = await fetch(await collectionUrl('/decisions'), {
    method: 'POST',
    headers: { 'Content-Type': 'application/json', 'X-Vitrine-Page-Key': key },
    body: JSON.stringify({ action: 'keep', path: group.keeper }),
  });
  assert.equal(recorded.status, 201);

  await page.focus(`[data-testid="groups"] .group[aria-labelledby="${group.heading}"]`);
  await page.keyboard.press('a');
  await page.waitForFunction(() => !document.querySelector('#view [aria-busy]'));
  const notice = await page.textContent('#view [data-testid="decision-notice"]:not([hidden])');
  assert.match(notice, /current state/, 'the refusal is shown');
  const shown = await itemState(planted.original);
  assert.equal(shown.decisions[group.keeper], 'keep', 'the view was reloaded with the other decision');
  assert.ok(!shown.decided, 'nothing of the refused batch was recorded');
  assert.equal((await progressCounts()).decided, before.decided);
});

test('decisions: after a reload the page shows the decisions the store holds', async () => {
  await openView('#/duplicates?per_page=500');
  await page.waitForSelector('[data-testid="groups"] .group');
  const progress = await progressCounts();
  await page.reload();
  await page.waitForSelector('[data-testid="groups"] .group');
  assert.equal((await progressCounts()).text, progress.text, 'the progress line is the same');
  for (const [files, keeper] of decided.keepers) {
    const shown = await itemState(files[0]);
    assert.ok(shown.decided && shown.chip, `group ${files.join(' + ')} is still decided`);
    for (const file of files) assert.equal(shown.decisions[file], file === keeper ? 'keep' : 'drop', file);
  }

  await openView('#/leakage?per_page=200');
  await page.reload();
  await page.waitForSelector('[data-testid="leaks"] .review-item');
  assert.equal((await progressCounts()).decided, decided.droppedLeaks.length);
  for (const file of decided.droppedLeaks) {
    const shown = await itemState(file);
    assert.ok(shown.decided, `leak ${file} is still decided`);
    assert.equal(shown.decisions[file], 'drop');
  }
});

/** The indexed demo files by the folder convention split/label/file; unsorted/ files have neither. */
function demoRows() {
  const broken = new Set(truth.broken.map((b) => b.path));
  const rows = fs.readdirSync(demoDir, { recursive: true })
    .map((name) => name.split(path.sep).join('/'))
    // Files at the top are the folder's own notes and ground truth, not images.
    .filter((name) => name.includes('/') && !broken.has(name) && fs.statSync(path.join(demoDir, name)).isFile())
    .map((name) => {
      const parts = name.split('/');
      return parts.length === 3 ? [name, parts[0], parts[1]] : [name, '', ''];
    });
  assert.equal(rows.length, truth.files.length - truth.broken.length, 'the folder holds the files ground truth lists');
  return rows;
}

/** The training list expected after the decisions above, as CSV lines sorted by path. */
function expectedManifest() {
  const dropped = new Set(decided.droppedLeaks);
  for (const [files, keeper] of decided.keepers) files.filter((f) => f !== keeper).forEach((f) => dropped.add(f));
  return ['path,split,label', ...demoRows()
    .filter(([file]) => !dropped.has(file))
    .map(([file, split, label]) => [file, split, decided.labels.get(file) ?? label])
    .sort(([a], [b]) => (a < b ? -1 : a > b ? 1 : 0))
    .map((row) => row.join(','))];
}

/** The training list as the page's link downloads it, as lines. */
async function downloadManifest() {
  const [download] = await Promise.all([page.waitForEvent('download'), page.click('#view [data-testid="manifest"]')]);
  return fs.readFileSync(await download.path(), 'utf8').split(/\r?\n/).filter((line, i, all) => line || i < all.length - 1);
}

test('decisions: the downloaded training list leaves out exactly the dropped copies', async () => {
  assert.equal(decided.keepers.size, truth.exact_duplicates.length, 'every planted exact group was decided above');
  await openView('#/duplicates?per_page=500');
  await page.waitForSelector('#view [data-testid="manifest"]');
  const lines = await downloadManifest();
  assert.deepEqual(lines, expectedManifest());
  // Ground truth: one file of each planted group of identical copies is left.
  for (const group of truth.exact_duplicates) {
    assert.equal(group.files.filter((f) => lines.some((line) => line.startsWith(`${f},`))).length, 1, `one of ${group.files.join(' + ')} is listed`);
  }
});

test('labels: suggestions and suspects beside their neighbours; a accepts a suggestion', async (t) => {
  const unlabelled = new Map(truth.unlabelled.map((u) => [u.path, u.true_label]));
  await page.click('.views a[data-view="labels"]');
  await page.waitForSelector('[data-testid="suggestions"] .review-item');
  const items = await page.$$eval('[data-testid="suggestions"] .review-item', (els) => els.map((el) => ({ path: el.dataset.path, proposed: el.dataset.proposed })));
  assert.ok(items.length >= 1, 'at least one unlabelled image gets a suggestion');
  for (const item of items) {
    assert.ok(unlabelled.has(item.path), `${item.path} is one of the unlabelled images`);
    assert.equal(item.proposed, unlabelled.get(item.path), `the suggestion for ${item.path} is the label it was rendered as`);
  }
  const first = items[0];
  const arguing = await page.waitForSelector(`[data-testid="suggestions"] .review-item[data-path="${first.path}"] [data-testid="arguing"]`);
  const neighbours = await arguing.$$eval('li', (els) => els.map((el) => ({ path: el.dataset.path, label: el.dataset.label })));
  assert.ok(neighbours.length >= 1, 'neighbours that argue for the suggestion are shown');
  for (const n of neighbours) {
    assert.equal(n.label, first.proposed, `${n.path} carries the suggested label`);
    assert.equal(n.path.split('/')[1], n.label, `${n.path} is labelled as its folder says`);
  }
  const start = await progressCounts();
  assert.deepEqual([start.decided, start.all], [0, items.length]);
  await shot('labels');

  await page.focus(`[data-testid="suggestions"] .review-item[data-path="${first.path}"]`);
  await page.keyboard.press('a');
  await untilSettled();
  const accepted = await page.$eval(`[data-testid="suggestions"] .review-item[data-path="${first.path}"]`, (el) => ({
    decided: el.dataset.decided, given: el.dataset.given, chip: el.querySelector('header .chip.decided')?.textContent,
  }));
  assert.deepEqual(accepted, { decided: 'true', given: unlabelled.get(first.path), chip: `labelled “${unlabelled.get(first.path)}”` });
  assert.equal((await progressCounts()).decided, 1);
  decided.labels.set(first.path, unlabelled.get(first.path));
  if (items.length > 1) assert.equal((await focusedItem()).path, items[1].path, 'focus moves on to the next suggestion');

  // Suspects: labelled images the collection contradicts. The demo plants no
  // mislabel, so a suspect can only be confirmed: c keeps its own label.
  await page.click('[data-tab="suspects"]');
  await page.waitForSelector('[data-testid="suspects"] .review-item, #view [data-state="empty"]');
  const suspects = await page.$$eval('[data-testid="suspects"] .review-item', (els) => els.map((el) => ({
    path: el.dataset.path, proposed: el.dataset.proposed, own: el.querySelector('.card .chip.label').textContent,
  })));
  t.diagnostic(`${suspects.length} suspect labels`);
  for (const suspect of suspects) {
    assert.equal(suspect.own, suspect.path.split('/')[1], `${suspect.path} shows its own label`);
    assert.notEqual(suspect.proposed, suspect.own, 'the label it points to is another one');
  }
  if (suspects.length) {
    const [suspect] = suspects;
    const strip = await page.waitForSelector(`[data-testid="suspects"] .review-item[data-path="${suspect.path}"] [data-testid="arguing"]`);
    assert.ok((await strip.$$eval('li', (els) => els.map((el) => el.dataset.label))).every((l) => l === suspect.proposed));
    await page.focus(`[data-testid="suspects"] .review-item[data-path="${suspect.path}"]`);
    await page.keyboard.press('c');
    await untilSettled();
    assert.equal(await page.getAttribute(`[data-testid="suspects"] .review-item[data-path="${suspect.path}"]`, 'data-given'), suspect.own);
    await shot('suspects');
  }

  // The given label is in the training list; a confirmed label changes nothing there.
  assert.deepEqual(await downloadManifest(), expectedManifest());
});

test('the page raised no script error', () => {
  assert.deepEqual(pageErrors, []);
});

test('no request from the page leaves the loopback address', () => {
  assert.ok(requests.length > 20, `requests were recorded (${requests.length})`);
  assertLoopbackOnly(requests);
});

