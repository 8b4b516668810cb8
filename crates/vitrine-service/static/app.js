// vitrine review page: plain JavaScript, no framework, talks only to its own
// origin (the JSON API under /api/v1). Views are chosen by the URL hash
// (#/search, #/duplicates, #/leakage, #/clusters, #/labels, #/image/ID) so every view
// can be bookmarked and the browser's back button works.
(() => {
  'use strict';

  const API = '/api/v1';
  const THUMB_SIZE = 160;
  const DETAIL_SIZE = 512;
  const TIERS = ['bytes', 'pixels', 'near'];
  const TIER_TEXT = {
    bytes: 'identical bytes',
    pixels: 'identical pixels',
    near: 'near-duplicate',
  };
  // Distinguishable on a light background and for common colour-vision deficiencies;
  // the usual splits keep one colour everywhere, others take the rest in turn.
  const SPLIT_COLOURS = { train: '#1f4e8c', val: '#c2410c', validation: '#c2410c', test: '#1d6a38', '(none)': '#6b717b' };
  const OTHER_SPLIT_COLOURS = ['#6a3d9e', '#8a4a08', '#0f5f5a', '#a3261b'];
  const SPLIT_ORDER = ['train', 'val', 'validation', 'test'];
  // The formats the indexer reads. Browsers name some of these types their own
  // way (image/x-ms-bmp) or leave the type empty, so the file name decides then;
  // the service tells the format from the bytes in any case.
  const UPLOAD_TYPES = ['image/jpeg', 'image/png', 'image/webp', 'image/gif', 'image/bmp', 'image/tiff'];
  const UPLOAD_EXTENSIONS = ['jpg', 'jpeg', 'jpe', 'jfif', 'png', 'webp', 'gif', 'bmp', 'dib', 'tif', 'tiff'];
  const UPLOAD_FORMATS_TEXT = 'JPEG, PNG, WebP, GIF, BMP or TIFF';

  const state = {
    collections: [],
    collection: null,
    status: null,
    controller: null,
    lastPath: null,
    // The last image dropped or picked in Search; kept so that changing a
    // filter re-runs the same query without asking for the file again.
    searchFile: null,
    searchFileUrl: null,
    pendingG: false,
    // Resolves with the key decisions are sent with (empty when the service gives none).
    pageKey: Promise.resolve(''),
  };

  // ------------------------------------------------------------------ DOM

  /** Creates an element: h('a', {href, class, onclick}, 'text', child, [more]). */
  function h(tag, attrs, ...children) {
    const el = document.createElement(tag);
    for (const [key, value] of Object.entries(attrs || {})) {
      if (value === undefined || value === null || value === false) continue;
      if (key === 'class') el.className = value;
      else if (key === 'dataset') Object.assign(el.dataset, value);
      else if (key.startsWith('on') && typeof value === 'function') el.addEventListener(key.slice(2), value);
      else if (key === 'text') el.textContent = value;
      // Through the CSSOM, which a Content-Security-Policy without 'unsafe-inline' still allows.
      else if (key === 'style') el.style.cssText = value;
      else if (value === true) el.setAttribute(key, '');
      else el.setAttribute(key, String(value));
    }
    append(el, children);
    return el;
  }

  function append(el, ...children) {
    for (const child of children.flat(Infinity)) {
      if (child === null || child === undefined || child === false) continue;
      el.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return el;
  }

  function announce(text) {
    const el = document.getElementById('announcer');
    el.textContent = '';
    // A fresh text node after a tick is announced even when it repeats.
    setTimeout(() => { el.textContent = text; }, 30);
  }

  // ------------------------------------------------------------------ API

  class ApiError extends Error {
    constructor(status, code, message) {
      super(message);
      this.status = status;
      this.code = code;
    }
  }

  // A whole-collection answer can take longer than one request may (the first
  // verified duplicate report decodes every candidate image); the service keeps
  // computing it, so a read that timed out, or met an index job, is asked again.
  const RETRIED_CODES = ['request_timeout', 'collection_busy'];
  const MAX_RETRIES = 20;

  async function api(path, options = {}) {
    const method = options.method || 'GET';
    for (let attempt = 0; ; attempt += 1) {
      let response;
      try {
        response = await fetch(API + path, {
          method,
          body: options.body,
          signal: options.signal,
          headers: Object.assign({ Accept: 'application/json' }, options.headers || {}),
        });
      } catch (err) {
        if (err.name === 'AbortError') throw err;
        throw new ApiError(0, 'unreachable', 'The vitrine service did not answer. Is `vitrine serve` still running?');
      }
      const text = await response.text();
      let data = null;
      if (text) {
        try { data = JSON.parse(text); } catch (_) { data = null; }
      }
      if (response.ok) return data;
      const error = (data && data.error) || {};
      if (method === 'GET' && response.status === 503 && RETRIED_CODES.includes(error.code) && attempt < MAX_RETRIES) {
        await new Promise((resolve) => setTimeout(resolve, 1000));
        if (options.signal && options.signal.aborted) throw new DOMException('aborted', 'AbortError');
        continue;
      }
      throw new ApiError(response.status, error.code || `http_${response.status}`,
        error.message || response.statusText || 'The request failed.');
    }
  }

  function collectionPath(suffix) {
    return `/collections/${encodeURIComponent(state.collection)}${suffix}`;
  }

  /** '?a=1&b=x' from an object, leaving out empty values; arrays repeat the key. */
  function queryString(params) {
    const search = new URLSearchParams();
    for (const [key, value] of Object.entries(params)) {
      if (Array.isArray(value)) value.forEach((v) => search.append(key, v));
      else if (value !== undefined && value !== null && value !== '') search.append(key, value);
    }
    const text = search.toString();
    return text ? `?${text}` : '';
  }

  function thumbnailUrl(id, size = THUMB_SIZE) {
    return `${API}${collectionPath(`/images/${encodeURIComponent(id)}/thumbnail`)}?size=${size}`;
  }

  // ------------------------------------------------ defensive field access

  /** The first of `keys` that `obj` has (not null). */
  function pick(obj, ...keys) {
    if (!obj || typeof obj !== 'object') return undefined;
    for (const key of keys) {
      if (obj[key] !== undefined && obj[key] !== null) return obj[key];
    }
    return undefined;
  }

  /** An array from a response that is either the array or an object holding it. */
  function listOf(data, ...keys) {
    if (Array.isArray(data)) return data;
    for (const key of keys) {
      const value = pick(data, key);
      if (Array.isArray(value)) return value;
    }
    return [];
  }

  /** An image reference, whether its fields are flat or under `image`. */
  function imageOf(item) {
    if (!item || typeof item !== 'object') return {};
    if (item.image && typeof item.image === 'object') return Object.assign({}, item, item.image);
    return item;
  }

  /** Names from a list of strings, of {name|split|label}, or of a name->count map. */
  function namesOf(value) {
    if (Array.isArray(value)) {
      return value.map((v) => (typeof v === 'string' ? v : pick(v, 'name', 'split', 'label'))).filter(Boolean);
    }
    if (value && typeof value === 'object') return Object.keys(value);
    return [];
  }

  function countOf(value) {
    if (typeof value === 'number') return value;
    if (Array.isArray(value)) return value.length;
    if (value && typeof value === 'object') {
      const n = pick(value, 'count', 'total', 'len');
      if (typeof n === 'number') return n;
    }
    return undefined;
  }

  function formatScore(value) {
    return typeof value === 'number' && Number.isFinite(value) ? value.toFixed(3) : '–';
  }

  function formatBytes(n) {
    if (typeof n !== 'number') return '';
    if (n < 1024) return `${n} B`;
    if (n < 1024 * 1024) return `${(n / 1024).toFixed(1)} KiB`;
    return `${(n / 1024 / 1024).toFixed(1)} MiB`;
  }

  function formatPercent(share) {
    return typeof share === 'number' ? `${(share * 100).toFixed(share < 0.1 ? 1 : 0)}%` : '';
  }

  function altText(img) {
    const split = img.split ? `split ${img.split}` : 'no split';
    const label = img.label ? `label ${img.label}` : 'no label';
    return `${img.path || `image ${img.id}`} (${split}, ${label})`;
  }

  // ------------------------------------------------------------- routing

  function parseHash() {
    const raw = location.hash.replace(/^#/, '');
    const [path, qs = ''] = raw.split('?');
    // '#/' names no view, like an empty hash: both open the default one.
    return { path: path && path !== '/' && path.startsWith('/') ? path : '/search', params: new URLSearchParams(qs) };
  }

  function href(path, params = {}) {
    return `#${path}${queryString(params)}`;
  }

  /** The current view's address with some parameters changed. */
  function hrefWith(updates) {
    const { path, params } = parseHash();
    const merged = Object.fromEntries(params.entries());
    for (const key of params.keys()) {
      const all = params.getAll(key);
      if (all.length > 1) merged[key] = all;
    }
    Object.assign(merged, updates);
    return href(path, merged);
  }

  function navigate(target) {
    if (location.hash === target) route();
    else location.hash = target;
  }

  const routes = [
    { pattern: /^\/search$/, view: 'search', render: renderSearch },
    { pattern: /^\/duplicates$/, view: 'duplicates', render: renderDuplicates },
    { pattern: /^\/leakage$/, view: 'leakage', render: renderLeakage },
    { pattern: /^\/clusters$/, view: 'clusters', render: renderClusters },
    { pattern: /^\/clusters\/([^/]+)$/, view: 'clusters', render: renderCluster },
    { pattern: /^\/labels$/, view: 'labels', render: renderLabels },
    { pattern: /^\/image\/([^/]+)$/, view: null, render: renderImage },
  ];

  async function route() {
    const { path, params } = parseHash();
    const match = routes.map((r) => ({ r, m: r.pattern.exec(path) })).find((x) => x.m);
    if (state.controller) state.controller.abort();
    const controller = new AbortController();
    state.controller = controller;

    for (const link of document.querySelectorAll('.views a')) {
      if (match && link.dataset.view === match.r.view) link.setAttribute('aria-current', 'page');
      else link.removeAttribute('aria-current');
    }

    const root = document.getElementById('view');
    const pathChanged = state.lastPath !== path;
    state.lastPath = path;
    // A control that changed the address is rebuilt with the view: focus returns to its twin.
    const focusedId = !pathChanged && document.activeElement && root.contains(document.activeElement)
      ? document.activeElement.id : '';
    if (nearScreenObserver) nearScreenObserver.disconnect();
    root.replaceChildren();
    if (!match) {
      root.append(emptyState('This page does not exist.', h('span', {}, 'Go to ', h('a', { href: '#/search' }, 'Search'), '.')));
      return;
    }
    if (!state.collection) {
      root.append(emptyState('No collection is being served.',
        'Index a folder with `vitrine index`, then start `vitrine serve` again.'));
      return;
    }
    const ctx = {
      root,
      params,
      signal: controller.signal,
      arg: match.m[1] !== undefined ? decodeURIComponent(match.m[1]) : undefined,
      isCurrent: () => state.controller === controller,
    };
    const rendering = match.r.render(ctx);
    const twin = focusedId && document.getElementById(focusedId);
    if (twin) twin.focus();
    try {
      await rendering;
    } catch (err) {
      if (err.name === 'AbortError' || !ctx.isCurrent()) return;
      root.append(errorState(err, () => route()));
    }
    if (pathChanged && ctx.isCurrent()) {
      const heading = root.querySelector('h1');
      if (heading) {
        heading.setAttribute('tabindex', '-1');
        heading.focus({ preventScroll: true });
      }
      window.scrollTo(0, 0);
    }
  }

  // --------------------------------------------------------- components

  function loadingState(text) {
    return h('div', { class: 'state loading', role: 'status' }, h('span', { class: 'spinner', 'aria-hidden': 'true' }), text);
  }

  function emptyState(title, hint) {
    return h('div', { class: 'state empty', dataset: { state: 'empty' } }, h('h2', {}, title), hint ? h('p', {}, hint) : null);
  }

  function errorState(err, retry) {
    const code = err instanceof ApiError ? err.code : 'page_error';
    return h('div', { class: 'state error', role: 'alert', dataset: { state: 'error' } },
      h('h2', {}, 'Something went wrong'),
      h('p', {}, err.message || String(err), ' ', h('code', {}, code)),
      retry ? h('button', { type: 'button', onclick: retry }, 'Try again') : null);
  }

  /** Replaces `slot`'s content with a loading line while `work` runs; errors land in the slot. */
  async function fill(ctx, slot, text, work) {
    slot.replaceChildren(loadingState(text));
    slot.setAttribute('aria-busy', 'true');
    try {
      const nodes = await work();
      if (!ctx.isCurrent()) return;
      slot.replaceChildren(...[nodes].flat().filter(Boolean));
    } catch (err) {
      if (err.name === 'AbortError' || !ctx.isCurrent()) return;
      slot.replaceChildren(errorState(err, () => fill(ctx, slot, text, work)));
    } finally {
      slot.removeAttribute('aria-busy');
    }
  }

  function viewHead(title, lede, ...extra) {
    return h('div', { class: 'view-head' },
      h('div', {}, h('h1', {}, title), lede ? h('p', { class: 'lede' }, lede) : null), extra);
  }

  function thumb(img, size = THUMB_SIZE, cls = 'thumb') {
    const el = h('img', {
      class: cls,
      src: thumbnailUrl(img.id, size),
      alt: altText(img),
      loading: 'lazy',
      decoding: 'async',
      width: size,
      height: size,
    });
    el.addEventListener('error', () => {
      const missing = h('span', { class: `${cls} missing`, role: 'img', 'aria-label': altText(img) }, 'no preview');
      el.replaceWith(missing);
    }, { once: true });
    return el;
  }

  function chip(text, cls) {
    return h('span', { class: `chip ${cls}` }, text);
  }

  function tierChip(tier) {
    const known = TIERS.includes(tier) ? tier : 'near';
    return h('span', { class: `chip tier tier-${known}`, title: TIER_TEXT[known] }, tier || 'near');
  }

  /** What a person decided for one image; the file itself is never touched. */
  function fateChip(fate) {
    return h('span', { class: `chip fate-${fate}`, title: 'Recorded in the store; the image file is not touched.' }, `decided: ${fate}`);
  }

  function splitLabelChips(img) {
    return h('div', { class: 'chips' },
      img.split ? chip(img.split, 'split') : chip('no split', 'none'),
      img.label ? chip(img.label, 'label') : chip('unlabelled', 'none'));
  }

  function scoreBar(value) {
    const width = Math.max(0, Math.min(1, typeof value === 'number' ? value : 0)) * 100;
    return h('div', { class: 'scorebar', 'aria-hidden': 'true' }, h('span', { style: `width:${width.toFixed(1)}%` }));
  }

  /**
   * One image as a card: its thumbnail links to the image's detail page.
   * options: score, tier, keeper, decision ('keep' | 'drop'), rank, meta (text), actions (nodes), tag (element name)
   */
  function imageCard(item, options = {}) {
    const img = imageOf(item);
    const detail = href(`/image/${encodeURIComponent(img.id)}`);
    const card = h(options.tag || 'article', {
      class: ['card', options.keeper && 'is-keeper', options.decision === 'drop' && 'is-dropped'].filter(Boolean).join(' '),
      dataset: { id: String(img.id), path: img.path || '' },
    });
    if (options.decision) card.dataset.decision = options.decision;
    if (options.rank !== undefined) card.append(h('span', { class: 'rank', 'aria-hidden': 'true' }, `#${options.rank}`));
    card.append(h('a', { class: 'thumb-link', href: detail }, thumb(img)));
    if (options.keeper !== undefined || options.tier || options.score !== undefined) {
      card.append(h('div', { class: 'row' },
        h('div', { class: 'chips' },
          options.keeper ? chip('suggested keeper', 'keeper') : null,
          options.tier ? tierChip(options.tier) : null),
        options.score !== undefined
          ? h('span', { class: 'score', title: 'cosine similarity' }, h('span', { class: 'visually-hidden' }, 'similarity '), formatScore(options.score))
          : null));
      if (options.score !== undefined) card.append(scoreBar(options.score));
    }
    card.append(h('p', { class: 'path' }, h('a', { href: detail }, pathText(img))));
    card.append(splitLabelChips(img));
    if (options.decision) card.append(h('div', { class: 'chips' }, fateChip(options.decision)));
    if (options.meta) card.append(h('p', { class: 'meta' }, options.meta));
    if (options.actions) card.append(h('div', { class: 'actions' }, options.actions));
    return card;
  }

  /** A path that wraps after its folder rather than inside the file name. */
  function pathText(img) {
    if (!img.path) return `image ${img.id}`;
    const cut = img.path.lastIndexOf('/') + 1;
    if (cut === 0) return h('span', { class: 'file' }, img.path);
    return [h('span', { class: 'dir' }, img.path.slice(0, cut)), h('wbr'), h('span', { class: 'file' }, img.path.slice(cut))];
  }

  function searchFromLink(img) {
    return h('a', { href: href('/search', { id: img.id }) }, 'Find similar');
  }

  /** Prev / next links for a paged list. */
  function pager({ page, perPage, total, shown }) {
    const pages = typeof total === 'number' ? Math.max(1, Math.ceil(total / perPage)) : undefined;
    const hasNext = pages !== undefined ? page < pages : shown >= perPage;
    const prev = h('a', { class: 'button', href: hrefWith({ page: page - 1 }), rel: 'prev', dataset: { pager: 'prev' } }, '← Previous');
    const next = h('a', { class: 'button', href: hrefWith({ page: page + 1 }), rel: 'next', dataset: { pager: 'next' } }, 'Next →');
    if (page <= 1) prev.setAttribute('aria-disabled', 'true');
    if (!hasNext) next.setAttribute('aria-disabled', 'true');
    const where = pages !== undefined
      ? `Page ${page} of ${pages} · ${total} in all`
      : `Page ${page}`;
    return h('nav', { class: 'pager', 'aria-label': 'Pages' }, prev, h('span', { class: 'where' }, where), next);
  }

  function pageParams(params, defaultPerPage) {
    const page = Math.max(1, parseInt(params.get('page') || '1', 10) || 1);
    const perPage = Math.max(1, Math.min(1000, parseInt(params.get('per_page') || String(defaultPerPage), 10) || defaultPerPage));
    return { page, perPage };
  }

  function perPageSelect(current, choices) {
    const select = h('select', { id: 'per-page' }, choices.map((n) => h('option', { value: n, selected: n === current }, String(n))));
    select.addEventListener('change', () => navigate(hrefWith({ per_page: select.value, page: 1 })));
    return h('div', { class: 'field' }, h('label', { for: 'per-page' }, 'Per page'), select);
  }

  /** A similarity threshold slider that re-queries when the user settles on a value. */
  function thresholdControl(requested, onSettle, { label = 'Similarity threshold', min = 0.7 } = {}) {
    const id = 'threshold';
    const current = Math.min(1, Math.max(min, Number.isFinite(requested) ? requested : 0.9));
    const input = h('input', { type: 'range', id, min: min.toFixed(2), max: '1', step: '0.005', value: current.toFixed(3) });
    const output = h('output', { for: id }, current.toFixed(3));
    let timer = null;
    input.addEventListener('input', () => { output.textContent = Number(input.value).toFixed(3); });
    input.addEventListener('change', () => {
      clearTimeout(timer);
      timer = setTimeout(() => onSettle(Number(input.value)), 250);
    });
    return h('div', { class: 'field' },
      h('label', { for: id }, label),
      h('div', { class: 'threshold' }, input, output));
  }

  /**
   * Near-pair settings shared by the duplicates and leakage views. While
   * verifying (the default), the slider is the similarity from which pairs are
   * checked and only confirmed pairs count; otherwise it is the threshold.
   */
  function nearSettings(params) {
    const verify = params.get('verify') !== 'false';
    const key = verify ? 'candidate_threshold' : 'threshold';
    const requested = params.get(key);
    return {
      verify,
      key,
      requested: requested ? Number(requested) : undefined,
      query: { verify: verify ? undefined : 'false', [key]: requested || undefined },
    };
  }

  function nearControls(near, shown) {
    const box = h('input', { type: 'checkbox', id: 'verify', checked: near.verify });
    box.addEventListener('change', () => navigate(hrefWith({
      verify: box.checked ? '' : 'false', threshold: '', candidate_threshold: '', page: 1,
    })));
    const slider = near.verify
      ? { label: 'Check pairs from similarity', min: 0.5 }
      : { label: 'Similarity threshold', min: 0.7 };
    return [
      h('div', { class: 'field' },
        h('span', {}, 'Near pairs'),
        h('label', { for: 'verify', class: 'inline-check' }, box, 'verify each pair')),
      thresholdControl(shown, (v) => navigate(hrefWith({ [near.key]: v.toFixed(3), page: 1 })), slider),
    ];
  }

  /** One sentence on how near pairs were judged in an answer. */
  function verificationText(verification) {
    if (!verification) return '';
    if (!verification.applied) {
      return verification.note ? ` Near pairs judged on cosine similarity alone: ${verification.note}.` : ' Near pairs judged on cosine similarity alone.';
    }
    return ` Near pairs verified: ${verification.confirmed} of ${verification.candidate_pairs} candidate pairs confirmed` +
      (verification.rejected_above_threshold ? `, ${verification.rejected_above_threshold} look-alikes above the threshold rejected` : '') +
      (verification.unavailable ? `, ${verification.unavailable} not checkable (file unreadable)` : '') + '.';
  }

  /** Text for how one near link was judged. */
  function checkText(check) {
    if (!check) return '';
    return check.status === 'confirmed' ? `verified ${formatScore(check.score)}` : 'cosine only';
  }

  function selectField(id, labelText, options, current, onChange) {
    const select = h('select', { id },
      options.map(([value, text]) => h('option', { value, selected: value === (current || '') }, text)));
    select.addEventListener('change', () => onChange(select.value));
    return h('div', { class: 'field' }, h('label', { for: id }, labelText), select);
  }

  // The status counts images without a split or label under '(none)': not a value to filter on.
  const NO_VALUE = '(none)';
  function splitNames() { return namesOf(pick(state.status, 'splits')).filter((s) => s !== NO_VALUE); }
  function labelNames() { return namesOf(pick(state.status, 'labels')).filter((l) => l !== NO_VALUE); }

  // ------------------------------------------------------ roving focus

  /**
   * Makes the items of `list` a roving-focus sequence: one is in the tab
   * order; j/k and the arrow keys (see onKeydown) move between them.
   */
  function makeReviewList(list) {
    list.classList.add('js-review');
    const items = list.querySelectorAll(':scope > li > .review-item, :scope > li > .cluster');
    items.forEach((item, index) => item.setAttribute('tabindex', index === 0 ? '0' : '-1'));
    list.addEventListener('focusin', (event) => {
      const item = event.target.closest('.review-item, .cluster');
      if (item && list.contains(item)) setCurrent(list, item);
    });
  }

  function reviewItems(list) {
    return Array.from(list.querySelectorAll(':scope > li > .review-item, :scope > li > .cluster'));
  }

  function setCurrent(list, item) {
    for (const other of list.querySelectorAll('.is-current')) {
      if (other !== item) {
        other.classList.remove('is-current');
        other.setAttribute('tabindex', '-1');
      }
    }
    item.classList.add('is-current');
    item.setAttribute('tabindex', '0');
  }

  function moveInReview(step) {
    const list = document.querySelector('#view .js-review');
    if (!list) return false;
    const items = reviewItems(list);
    if (!items.length) return false;
    const current = list.querySelector('.is-current') || null;
    let index = current ? items.indexOf(current) + step : 0;
    if (index < 0) index = 0;
    if (index >= items.length) {
      announce('End of this page. Press n for the next page.');
      index = items.length - 1;
    }
    focusItem(list, items[index]);
    return true;
  }

  function focusItem(list, item) {
    setCurrent(list, item);
    item.focus({ preventScroll: true });
    item.scrollIntoView({ block: 'nearest' });
  }

  /**
   * The decision button a letter key presses: the focused item's own (so a
   * decision never lands on an item the reviewer is not looking at), else a
   * view-wide one such as undo.
   */
  function buttonForKey(key, target) {
    const selector = `button[data-key="${key}"]`;
    const item = target instanceof Element ? target.closest('#view .review-item') : null;
    const button = (item && item.querySelector(selector)) ||
      Array.from(document.querySelectorAll(`#view ${selector}`)).find((b) => !b.closest('.review-item'));
    return button && !button.disabled ? button : null;
  }

  function isTyping(target) {
    return target instanceof HTMLElement &&
      (target.isContentEditable || ['INPUT', 'SELECT', 'TEXTAREA'].includes(target.tagName));
  }

  function onKeydown(event) {
    if (event.altKey || event.ctrlKey || event.metaKey || isTyping(event.target)) return;
    const key = event.key;
    if (state.pendingG) {
      state.pendingG = false;
      const views = { s: '#/search', d: '#/duplicates', l: '#/leakage', c: '#/clusters', b: '#/labels' };
      if (views[key]) { event.preventDefault(); navigate(views[key]); }
      return;
    }
    const inReview = event.target instanceof Element && event.target.closest('.js-review');
    if (key === 'j' || (key === 'ArrowDown' && inReview)) {
      if (moveInReview(1)) event.preventDefault();
    } else if (key === 'k' || (key === 'ArrowUp' && inReview)) {
      if (moveInReview(-1)) event.preventDefault();
    } else if (key === 'Enter' && event.target.matches && event.target.matches('.review-item, .cluster')) {
      const link = event.target.querySelector('a[data-open], a.thumb-link');
      if (link) { event.preventDefault(); link.click(); }
    } else if (key === 'n' || key === 'p') {
      const link = document.querySelector(`#view [data-pager="${key === 'n' ? 'next' : 'prev'}"]:not([aria-disabled])`);
      if (link) { event.preventDefault(); link.click(); }
    } else if (key === 'g') {
      state.pendingG = true;
      setTimeout(() => { state.pendingG = false; }, 1200);
    } else if (/^[a-z]$/.test(key)) {
      const button = buttonForKey(key, event.target);
      if (button) { event.preventDefault(); button.click(); }
    }
  }

  // --------------------------------------------------------- decisions
  // Decisions are recorded in the collection's store only: the training list
  // the service writes leaves dropped images out, the image files stay as they are.

  /** Records one decision; the page key shows the service it comes from its own page. */
  async function postDecision(body) {
    return api(collectionPath('/decisions'), {
      method: 'POST',
      body: JSON.stringify(body),
      headers: { 'Content-Type': 'application/json', 'X-Vitrine-Page-Key': await state.pageKey },
    });
  }

  /**
   * Records `requests` in order, each with the latest decision number the
   * reviewer saw on its images (`seen`: path -> number), so the service can
   * refuse it when someone else decided on them meanwhile. Each answer moves
   * `seen` on: the second decision of a batch on one image is not a conflict.
   */
  async function recordDecisions(requests, seen) {
    for (const request of requests) {
      const paths = request.path ? [request.path] : [request.first, request.second];
      const recorded = await postDecision({ ...request, seen: Math.max(...paths.map((p) => seen.get(p) || 0)) });
      for (const path of paths) seen.set(path, recorded.number);
    }
  }

  function decisionLog(ctx) {
    return api(collectionPath('/decisions'), { signal: ctx.signal });
  }

  /** The root-relative paths a logged decision names (none for an undo). */
  function decisionPaths(decision) {
    if (decision.image) return [decision.image.path];
    if (decision.first) return [decision.first.path, decision.second.path];
    return [];
  }

  function inEffect(decision) {
    return decision.undone_by === null && !decision.stale && decision.action !== 'undo';
  }

  /** path -> the latest decision in effect on it, of `actions` (of any action when omitted). */
  function latestByPath(log, actions) {
    const latest = new Map();
    for (const decision of log.decisions) {
      if (!inEffect(decision) || (actions && !actions.includes(decision.action))) continue;
      for (const path of decisionPaths(decision)) latest.set(path, decision);
    }
    return latest;
  }

  const ACTION_TEXT = {
    drop: 'drop', keep: 'keep', distinct: 'not copies', label: 'label', reject_suggestion: 'reject the suggestion', split: 'split',
  };

  function describeDecision(decision) {
    const value = decision.action === 'label' ? ` “${decision.label}”` : decision.action === 'split' ? ` ${decision.split}` : '';
    return `${ACTION_TEXT[decision.action]}${value} (${decisionPaths(decision).join(' and ')})`;
  }

  /**
   * 'a of b groups decided · c pairs left out as not copies' from a report
   * page's counts; under `undecided` its total counts the open ones only.
   */
  function reportProgress(report, total, undecidedOnly, noun) {
    const all = undecidedOnly ? total + report.decided : total;
    const leftOut = report.left_out_as_distinct;
    return `${report.decided} of ${all} ${noun}${all === 1 ? '' : 's'} decided` +
      (leftOut ? ` · ${leftOut} pair${leftOut === 1 ? '' : 's'} left out as not copies` : '');
  }

  /** A button for one decision; `key` presses it while its item (or, outside items, its view) has focus. */
  function decisionButton(key, text, onclick, disabled = false) {
    return h('button', { type: 'button', class: 'decision', dataset: { key }, 'aria-keyshortcuts': key, disabled, onclick },
      h('kbd', { 'aria-hidden': 'true' }, key), text);
  }

  function undecidedToggle(params) {
    const box = h('input', { type: 'checkbox', id: 'undecided', checked: params.get('undecided') === 'true' });
    box.addEventListener('change', () => navigate(hrefWith({ undecided: box.checked ? 'true' : '', page: 1 })));
    return h('div', { class: 'field' }, h('span', {}, 'Show'), h('label', { for: 'undecided', class: 'inline-check' }, box, 'Still to review'));
  }

  function manifestLink() {
    return h('a', { class: 'button', href: `${API}${collectionPath('/manifest')}`, download: true, dataset: { testid: 'manifest' } },
      'Download training list (CSV)');
  }

  function holdsPath(item, path) {
    return Array.from(item.querySelectorAll('.card')).some((card) => card.dataset.path === path);
  }

  /**
   * The decide-then-refresh loop of a review view. After each decision the
   * view's report is asked for again: only the service knows how a decision
   * changes groups, leaks and counts, and the page shows what the store holds.
   * `load()` resolves with the slot's nodes (a list made by makeReviewList,
   * each item with a `data-item` key) and writes the `progress` line.
   */
  function decisionSession(ctx, { slot, progress, notice, load }) {
    let busy = false;

    async function refresh(choose) {
      const current = slot.querySelector('.is-current');
      const currentKey = current && current.dataset.item;
      const nodes = await load();
      if (!ctx.isCurrent()) return;
      slot.replaceChildren(...[nodes].flat().filter(Boolean));
      const list = slot.querySelector('.js-review');
      const items = list ? reviewItems(list) : [];
      const target = items.length && (choose(items) || items.find((i) => i.dataset.item === currentKey) || items[0]);
      if (target) focusItem(list, target);
      else progress.focus();
    }

    async function run(work) {
      if (busy) {
        announce('Still recording the last decision.');
        return;
      }
      busy = true;
      slot.setAttribute('aria-busy', 'true');
      notice.hidden = true;
      try {
        const outcome = await work();
        if (ctx.isCurrent()) announce(outcome);
      } catch (err) {
        if (err.name === 'AbortError' || !ctx.isCurrent()) return;
        notice.textContent = err.status === 409 ? `${err.message} The view now shows the current state.` : err.message;
        notice.hidden = false;
      } finally {
        busy = false;
        slot.removeAttribute('aria-busy');
      }
    }

    /** Records `requests` for `item`, then shows the result with focus on the next item. */
    function decide(item, requests, seen, doneText) {
      return run(async () => {
        const key = item.dataset.item;
        const before = reviewItems(item.closest('.js-review'));
        const index = before.indexOf(item);
        const nextKey = before[index + 1] && before[index + 1].dataset.item;
        let failure = null;
        try {
          await recordDecisions(requests, seen);
        } catch (err) {
          failure = err;
        }
        // Refreshed even after a refusal: the view then shows what the store holds now.
        await refresh((items) => {
          const byKey = (k) => k !== undefined && items.find((i) => i.dataset.item === k);
          if (failure) return byKey(key) || items[Math.min(index, items.length - 1)];
          return byKey(nextKey) || items[Math.min(index + (byKey(key) ? 1 : 0), items.length - 1)];
        });
        if (failure) throw failure;
        return `${doneText} ${progress.textContent}.`;
      });
    }

    /** Takes back the collection's latest decision still in effect, then focuses the item it was about. */
    function undo() {
      return run(async () => {
        const log = await decisionLog(ctx);
        const last = log.decisions.filter((d) => d.undone_by === null && d.action !== 'undo').pop();
        if (!last) return 'There is no decision to undo.';
        await postDecision({ action: 'undo', decision: last.number });
        const paths = decisionPaths(last);
        await refresh((items) => items.find((item) => paths.some((path) => holdsPath(item, path))));
        return `Undone: ${describeDecision(last)}. ${progress.textContent}.`;
      });
    }

    return { decide, undo };
  }

  /** The line that counts decided items, the notice for refused decisions and the undo button. */
  function decisionBar(session, progress, notice) {
    return h('div', { class: 'decision-bar' },
      progress,
      decisionButton('u', 'Undo last decision', () => session.undo()),
      manifestLink(),
      notice);
  }

  function decisionParts() {
    return {
      progress: h('p', { class: 'progress', tabindex: '-1', dataset: { testid: 'progress' } }),
      notice: h('p', { class: 'decision-notice', role: 'alert', hidden: true, dataset: { testid: 'decision-notice' } }),
    };
  }

  // ------------------------------------------------------------ Search

  async function renderSearch(ctx) {
    const { params, root } = ctx;
    const filters = {
      split: params.get('split') || '',
      label: params.get('label') || '',
      prefix: params.get('prefix') || '',
      k: parseInt(params.get('k') || '24', 10) || 24,
    };
    const queryId = params.get('id');
    if (queryId) state.searchFile = null;

    const uploadOff = state.status && state.status.model_loaded === false;
    const accept = [...UPLOAD_TYPES, ...UPLOAD_EXTENSIONS.map((ext) => `.${ext}`)].join(',');
    const fileInput = h('input', { type: 'file', id: 'query-file', accept, class: 'visually-hidden' });
    const dropzone = h('div', { class: 'dropzone', dataset: { testid: 'dropzone' } },
      h('strong', {}, 'Drop an image here'),
      h('p', {}, `${UPLOAD_FORMATS_TEXT}. It is compared with the collection, not added to it.`),
      h('label', { for: 'query-file', class: 'button primary' }, 'Choose an image…'),
      uploadOff ? h('p', { role: 'note' }, 'The service has not loaded this collection’s model, so uploaded images cannot be compared. Indexed images still can.') : null,
      fileInput);
    const preview = h('div', { class: 'query-preview', hidden: true });
    const filterForm = searchFilters(filters);
    const results = h('section', { class: 'results', 'aria-labelledby': 'results-head' });
    const browse = h('section', { class: 'browse', 'aria-labelledby': 'browse-head' });

    root.append(
      viewHead('Search by image', 'Start from an image of your own or from any indexed image; its nearest neighbours are listed by cosine similarity.'),
      h('div', { class: 'search-layout' },
        h('aside', { class: 'query-panel', 'aria-label': 'Query' }, dropzone, preview, filterForm),
        h('div', {}, results, browse)));

    const useFile = (file) => {
      if (!file) return;
      if (!isUploadable(file)) {
        results.replaceChildren(errorState(new ApiError(0, 'unsupported_type', `${file.name} is not a ${UPLOAD_FORMATS_TEXT} image.`)));
        return;
      }
      state.searchFile = file;
      if (state.searchFileUrl) URL.revokeObjectURL(state.searchFileUrl);
      state.searchFileUrl = URL.createObjectURL(file);
      if (params.get('id')) navigate(hrefWith({ id: '' }));
      else runSearch(ctx, filters, null, preview, results);
    };
    fileInput.addEventListener('change', () => useFile(fileInput.files && fileInput.files[0]));
    dropzone.addEventListener('dragover', (event) => { event.preventDefault(); dropzone.classList.add('is-over'); });
    dropzone.addEventListener('dragleave', () => dropzone.classList.remove('is-over'));
    dropzone.addEventListener('drop', (event) => {
      event.preventDefault();
      dropzone.classList.remove('is-over');
      useFile(event.dataTransfer && event.dataTransfer.files[0]);
    });

    if (queryId || state.searchFile) runSearch(ctx, filters, queryId, preview, results);
    else {
      results.append(h('div', { class: 'section-head' }, h('h2', { id: 'results-head' }, 'Nearest neighbours')),
        emptyState('No query yet.', 'Drop or choose an image, or pick one from the collection below.'));
    }
    renderBrowse(ctx, filters, browse);
  }

  /** Whether the service can read `file`: by its type, else by its file name. */
  function isUploadable(file) {
    if (UPLOAD_TYPES.includes(file.type)) return true;
    const dot = file.name.lastIndexOf('.');
    return dot > 0 && UPLOAD_EXTENSIONS.includes(file.name.slice(dot + 1).toLowerCase());
  }

  /** The upload's Content-Type: the service takes any image type, or octet-stream when the browser named none. */
  function uploadType(file) {
    return file.type.startsWith('image/') ? file.type : 'application/octet-stream';
  }

  /** The uploaded query as the browser shows it; some formats (TIFF) it cannot show. */
  function uploadPreview(file) {
    const img = h('img', { src: state.searchFileUrl, alt: `query: uploaded file ${file.name}` });
    img.addEventListener('error', () => {
      img.replaceWith(h('span', { class: 'missing', dataset: { testid: 'no-preview' } }, `No preview: this browser cannot show ${file.name}.`));
    }, { once: true });
    return img;
  }

  function searchFilters(filters) {
    const splitSelect = h('select', { id: 'filter-split', name: 'split' },
      h('option', { value: '' }, 'any split'),
      splitNames().map((s) => h('option', { value: s, selected: s === filters.split }, s)));
    const labelSelect = h('select', { id: 'filter-label', name: 'label' },
      h('option', { value: '' }, 'any label'),
      labelNames().map((l) => h('option', { value: l, selected: l === filters.label }, l)));
    const prefix = h('input', { type: 'search', id: 'filter-prefix', name: 'prefix', value: filters.prefix, placeholder: 'e.g. train/mug/', autocomplete: 'off', spellcheck: 'false' });
    const k = h('input', { type: 'number', id: 'filter-k', name: 'k', min: '1', max: '200', value: String(filters.k) });
    const form = h('form', { class: 'filters', 'aria-label': 'Filters' },
      h('h2', {}, 'Filters'),
      h('div', { class: 'field' }, h('label', { for: 'filter-split' }, 'Split'), splitSelect),
      h('div', { class: 'field' }, h('label', { for: 'filter-label' }, 'Label'), labelSelect),
      h('div', { class: 'field' }, h('label', { for: 'filter-prefix' }, 'Folder prefix'), prefix),
      h('div', { class: 'field' }, h('label', { for: 'filter-k' }, 'Neighbours'), k),
      h('div', { class: 'buttons' },
        h('button', { type: 'submit', class: 'primary' }, 'Apply'),
        h('a', { class: 'button', href: hrefWith({ split: '', label: '', prefix: '', page: '' }) }, 'Clear')));
    form.addEventListener('submit', (event) => {
      event.preventDefault();
      navigate(hrefWith({ split: splitSelect.value, label: labelSelect.value, prefix: prefix.value.trim(), k: k.value, page: '' }));
    });
    return form;
  }

  function runSearch(ctx, filters, queryId, preview, results) {
    const q = { k: filters.k, split: filters.split, label: filters.label, prefix: filters.prefix };
    preview.hidden = false;
    if (queryId) {
      preview.replaceChildren(h('p', { class: 'side-label' }, 'Query: indexed image'),
        h('img', { src: thumbnailUrl(queryId, 320), alt: `query image ${queryId}` }));
      api(collectionPath(`/images/${encodeURIComponent(queryId)}`), { signal: ctx.signal }).then((meta) => {
        const img = imageOf(meta);
        const shown = preview.querySelector('img');
        if (shown) shown.alt = `query: ${altText(img)}`;
        preview.append(h('p', { class: 'path' }, h('a', { href: href(`/image/${encodeURIComponent(queryId)}`) }, img.path || queryId)), splitLabelChips(img));
      }).catch(() => {});
    } else {
      const file = state.searchFile;
      preview.replaceChildren(h('p', { class: 'side-label' }, 'Query: your image'),
        uploadPreview(file),
        h('p', { class: 'path' }, `${file.name} · ${formatBytes(file.size)}`));
    }

    const head = h('div', { class: 'section-head' }, h('h2', { id: 'results-head' }, 'Nearest neighbours'));
    const body = h('div', {});
    results.replaceChildren(head, body);
    fill(ctx, body, 'Looking for neighbours…', async () => {
      const data = queryId
        ? await api(collectionPath(`/images/${encodeURIComponent(queryId)}/neighbours`) + queryString(q), { signal: ctx.signal })
        : await api(collectionPath('/search') + queryString(q), {
          method: 'POST',
          body: state.searchFile,
          headers: { 'Content-Type': uploadType(state.searchFile) },
          signal: ctx.signal,
        });
      const hits = listOf(data, 'hits', 'neighbours', 'results').map(imageOf)
        .filter((hit) => String(hit.id) !== String(queryId));
      announce(`${hits.length} neighbours found.`);
      head.append(h('p', {}, describeFilters(filters, hits.length)));
      if (!hits.length) {
        return emptyState('No neighbours match these filters.', 'Clear a filter or widen the folder prefix.');
      }
      return h('ol', { class: 'grid', dataset: { testid: 'hits' } },
        hits.map((hit, index) => imageCard(hit, {
          tag: 'li',
          rank: index + 1,
          score: pick(hit, 'similarity', 'score'),
          actions: [searchFromLink(hit)],
        })));
    });
  }

  function describeFilters(filters, count) {
    const parts = [];
    if (filters.split) parts.push(`split ${filters.split}`);
    if (filters.label) parts.push(`label ${filters.label}`);
    if (filters.prefix) parts.push(`under ${filters.prefix}`);
    return `${count} shown${parts.length ? `, ${parts.join(', ')}` : ''}; higher is more similar (1.000 = same embedding).`;
  }

  function renderBrowse(ctx, filters, section) {
    const { page, perPage } = pageParams(ctx.params, 48);
    const head = h('div', { class: 'section-head' },
      h('h2', { id: 'browse-head' }, 'Browse the collection'),
      h('p', {}, 'Pick any indexed image to use it as the query.'));
    const body = h('div', {});
    section.replaceChildren(head, body);
    fill(ctx, body, 'Loading images…', async () => {
      const data = await api(collectionPath('/images') + queryString({
        page, per_page: perPage, split: filters.split, label: filters.label, prefix: filters.prefix,
      }), { signal: ctx.signal });
      const images = listOf(data, 'images', 'items').map(imageOf);
      const total = pick(data, 'total');
      if (!images.length) return emptyState('No indexed image matches these filters.', 'Clear the filters to see the whole collection.');
      return [
        h('ul', { class: 'grid', dataset: { testid: 'browse' } }, images.map((img) => imageCard(img, {
          tag: 'li',
          actions: [h('a', { href: hrefWith({ id: img.id }), dataset: { query: String(img.id) } }, 'Use as query')],
        }))),
        pager({ page, perPage, total, shown: images.length }),
      ];
    });
  }

  // -------------------------------------------------------- Duplicates

  async function renderDuplicates(ctx) {
    const { params, root } = ctx;
    const { page, perPage } = pageParams(params, 50);
    const near = nearSettings(params);
    const undecidedOnly = params.get('undecided') === 'true';
    const slot = h('div', {});
    const summary = h('p', { class: 'lede', 'aria-live': 'polite', dataset: { testid: 'duplicates-summary' } });
    const { progress, notice } = decisionParts();
    let shownGroups = [];
    let shownValue = near.requested;

    const exportButtons = [
      h('button', { type: 'button', dataset: { export: 'csv' }, onclick: () => exportGroups('csv', shownGroups, shownValue) }, 'Export CSV'),
      h('button', { type: 'button', dataset: { export: 'json' }, onclick: () => exportGroups('json', shownGroups, shownValue) }, 'Export JSON'),
    ];
    exportButtons.forEach((b) => { b.disabled = true; });
    const toolbarSlot = h('div', { class: 'toolbar', role: 'group', 'aria-label': 'Duplicate settings' });

    const load = async (first) => {
      const data = await api(collectionPath('/duplicates') + queryString({
        ...near.query, undecided: undecidedOnly ? 'true' : undefined, page, per_page: perPage,
      }), { signal: ctx.signal });
      const groups = listOf(data, 'groups');
      const total = pick(data, 'total');
      const served = pick(data, near.key);
      if (shownValue === undefined && typeof served === 'number') {
        shownValue = served;
        buildToolbar(served);
      }
      shownGroups = groups;
      exportButtons.forEach((b) => { b.disabled = !groups.length; });
      const count = typeof total === 'number' ? total : groups.length;
      const tierCounts = TIERS.map((t) => [t, groups.filter((g) => g.tier === t).length]).filter(([, n]) => n);
      const bound = near.verify ? 'checked from similarity' : 'at similarity';
      const text = `${count}${undecidedOnly ? ' undecided' : ''} group${count === 1 ? '' : 's'}` +
        (shownValue !== undefined ? ` ${bound} ≥ ${shownValue.toFixed(3)}` : '') +
        (tierCounts.length ? ` · this page: ${tierCounts.map(([t, n]) => `${n} ${TIER_TEXT[t]}`).join(', ')}` : '') +
        '.' + verificationText(data.verification) +
        ' Use j / k to step through the groups; a accepts the suggested keeper, x marks a group as not copies, u undoes.';
      // Rewritten only when it changes, so a refresh after a decision does not repeat it aloud.
      if (summary.textContent !== text) summary.textContent = text;
      // Groups made up for the render benchmark carry no decision counts.
      progress.textContent = typeof data.decided === 'number' ? reportProgress(data, count, undecidedOnly, 'group') : '';
      if (first) announce(`${count} duplicate groups.`);
      if (!groups.length) {
        if (undecidedOnly) return emptyState('No group is left to review on this page.', 'Clear “Still to review” to see the decided groups.');
        return emptyState('No duplicate groups at this setting.',
          near.verify ? 'Lower the similarity from which pairs are checked, or turn verification off.' : 'Lower the similarity threshold to include looser near-duplicates.');
      }
      const offset = (page - 1) * perPage;
      const list = h('ol', {
        class: 'review-list tiles',
        dataset: { testid: 'groups', threshold: shownValue !== undefined ? shownValue.toFixed(3) : '' },
        'aria-label': 'Duplicate groups',
      });
      const fragment = document.createDocumentFragment();
      groups.forEach((group, index) => fragment.append(h('li', {}, duplicateGroup(group, offset + index + 1, session))));
      list.append(fragment);
      makeReviewList(list);
      return [list, pager({ page, perPage, total, shown: groups.length })];
    };
    const session = decisionSession(ctx, { slot, progress, notice, load });

    root.append(
      viewHead('Duplicates', 'Groups of copies of one picture. The suggested keeper (most pixels, then largest file) is outlined in green; the others are copies to review.'),
      toolbarSlot, summary, decisionBar(session, progress, notice), slot);

    const buildToolbar = (value) => {
      toolbarSlot.replaceChildren(
        ...nearControls(near, value),
        perPageSelect(perPage, [25, 50, 100, 200, 500]),
        undecidedToggle(params),
        h('span', { class: 'spacer' }),
        ...exportButtons);
    };
    buildToolbar(shownValue !== undefined ? shownValue : 0.9);

    await fill(ctx, slot, near.verify ? 'Finding and verifying duplicate groups…' : 'Finding duplicate groups…', () => load(true));
  }

  function duplicateGroup(group, number, session) {
    const members = listOf(group, 'members').map(imageOf);
    const keeper = members.find((m) => m.keeper) || members[0];
    const others = members.filter((m) => m !== keeper);
    const seen = new Map(members.map((m) => [m.path, m.last_decision]));
    const headingId = `group-${number}`;
    const section = h('section', {
      class: `review-item group${group.decided ? ' is-decided' : ''}`,
      'aria-labelledby': headingId,
      dataset: { tier: group.tier || '', item: keeper.path, decided: String(Boolean(group.decided)) },
    });
    const decide = (requests, doneText) => session.decide(section, requests, seen, `Group ${number}: ${doneText}.`);
    return append(section,
      h('header', {},
        h('h2', { id: headingId }, `Group ${number}`),
        tierChip(group.tier),
        group.decided ? chip('decided', 'decided') : null,
        h('span', { class: 'count' }, `${members.length} images`)),
      h('div', { class: 'members' }, members.map((m) => imageCard(m, {
        keeper: Boolean(m.keeper),
        decision: m.decision,
        tier: m.keeper ? null : m.tier,
        score: m.keeper ? undefined : pick(m, 'similarity'),
        meta: [m.width && m.height ? `${m.width}×${m.height}` : '', formatBytes(m.byte_size), checkText(m.check)].filter(Boolean).join(' · '),
      }))),
      h('div', { class: 'decide', role: 'group', 'aria-label': `Decide on group ${number}` },
        decisionButton('a', 'Accept suggestion', () => decide(
          [{ action: 'keep', path: keeper.path }, ...others.map((m) => ({ action: 'drop', path: m.path }))],
          `kept ${keeper.path}, dropped ${others.length}`)),
        decisionButton('x', 'Not copies', () => decide(
          others.map((m) => ({ action: 'distinct', first: keeper.path, second: m.path })), 'marked as not copies'))));
  }

  const CSV_COLUMNS = ['group', 'group_tier', 'id', 'path', 'root', 'split', 'label', 'tier', 'similarity', 'check', 'check_score', 'keeper', 'width', 'height', 'byte_size'];

  function csvField(value) {
    let text = value === undefined || value === null ? '' : String(value);
    // A leading = + - @ would be read as a formula by spreadsheet programs.
    if (/^[=+\-@]/.test(text) && typeof value !== 'number') text = `'${text}`;
    return /[",\r\n]/.test(text) ? `"${text.replace(/"/g, '""')}"` : text;
  }

  function exportGroups(format, groups, threshold) {
    const stamp = new Date().toISOString().replace(/[:]/g, '-').replace(/\..*/, '');
    const name = `${state.collection}-duplicates-${stamp}`;
    if (format === 'json') {
      const body = JSON.stringify({ collection: state.collection, similarity_setting: threshold, groups }, null, 2);
      download(`${name}.json`, 'application/json', body);
    } else {
      const rows = [CSV_COLUMNS.join(',')];
      groups.forEach((group, index) => {
        for (const member of listOf(group, 'members').map(imageOf)) {
          rows.push([index + 1, group.tier, member.id, member.path, member.root, member.split, member.label,
            member.tier, member.similarity, member.check && member.check.status, member.check && member.check.score,
            member.keeper, member.width, member.height, member.byte_size].map(csvField).join(','));
        }
      });
      download(`${name}.csv`, 'text/csv', `${rows.join('\r\n')}\r\n`);
    }
    announce(`Exported ${groups.length} groups as ${format.toUpperCase()}.`);
  }

  function download(filename, type, text) {
    const url = URL.createObjectURL(new Blob([text], { type }));
    const link = h('a', { href: url, download: filename, hidden: true });
    document.body.append(link);
    link.click();
    link.remove();
    setTimeout(() => URL.revokeObjectURL(url), 5000);
  }

  // ----------------------------------------------------------- Leakage

  async function renderLeakage(ctx) {
    const { params, root } = ctx;
    const { page, perPage } = pageParams(params, 50);
    const splits = splitNames();
    // No reference split (the default): each split is checked against every
    // split before it (train, then val, then test), as the service does.
    const against = params.get('against') || '';
    const chosen = params.getAll('split').filter((s) => s !== against);
    const near = nearSettings(params);

    const checks = splits.filter((s) => s !== against).map((s) => {
      const id = `eval-${s}`;
      const box = h('input', { type: 'checkbox', id, value: s, checked: !chosen.length || chosen.includes(s) });
      box.addEventListener('change', () => {
        const picked = Array.from(root.querySelectorAll('.checks input:checked')).map((b) => b.value);
        if (!picked.length) {
          box.checked = true;
          announce('At least one split is evaluated.');
          return;
        }
        navigate(hrefWith({ split: picked, page: 1 }));
      });
      return h('label', { for: id }, box, s);
    });
    const toolbar = h('div', { class: 'toolbar', role: 'group', 'aria-label': 'Leakage settings' },
      h('fieldset', { class: 'field' }, h('legend', {}, 'Evaluated splits'), h('div', { class: 'checks' }, checks.length ? checks : h('span', {}, 'no other split'))),
      selectField('against', 'Reference split', [['', 'every earlier split'], ...splits.map((s) => [s, s])], against,
        (value) => navigate(hrefWith({ against: value, split: [], page: 1 }))),
      ...nearControls(near, near.requested !== undefined ? near.requested : (near.verify ? 0.6 : 0.9)),
      perPageSelect(perPage, [25, 50, 100, 200]),
      undecidedToggle(params));
    const undecidedOnly = params.get('undecided') === 'true';
    const summarySlot = h('div', {});
    const listSlot = h('div', {});
    const { progress, notice } = decisionParts();

    const load = async (first) => {
      const [data, log] = await Promise.all([
        api(collectionPath('/leaks') + queryString({
          split: chosen, against: against || undefined, ...near.query, undecided: undecidedOnly ? 'true' : undefined, page, per_page: perPage,
        }), { signal: ctx.signal }),
        decisionLog(ctx),
      ]);
      const reference = data.reference_split || 'an earlier split';
      const summary = listOf(data, 'summary');
      summarySlot.replaceChildren(...[leakSummary(summary, reference)].filter(Boolean));
      const leaks = listOf(data, 'leaks', 'pairs');
      const total = pick(data, 'total');
      const count = typeof total === 'number' ? total : leaks.length;
      if (first) announce(`${count} leaked images.`);
      if (data.between.length > 1) {
        summarySlot.append(h('p', { class: 'lede', dataset: { testid: 'leaks-between' } },
          `Between splits: ${data.between.map((b) => `${b.leaked} ${b.split} from ${b.from}`).join(', ')}.`));
      }
      summarySlot.append(h('p', { class: 'lede' }, verificationText(data.verification).trim()));
      progress.textContent = reportProgress(data, count, undecidedOnly, 'leak');
      if (!leaks.length) {
        if (undecidedOnly) return emptyState('No leak is left to review on this page.', 'Clear “Still to review” to see the decided leaks.');
        return emptyState(`No image of the evaluated splits has a copy in ${reference}.`,
          'At a lower threshold looser near-duplicates are reported too.');
      }
      // The leak report says whether a leak is settled, the log how.
      const fates = latestByPath(log, ['drop', 'keep']);
      const offset = (page - 1) * perPage;
      const list = h('ol', { class: 'review-list leak-grid', dataset: { testid: 'leaks' }, 'aria-label': 'Leaked pairs' });
      const fragment = document.createDocumentFragment();
      leaks.forEach((leak, index) => fragment.append(h('li', {}, leakPair(leak, offset + index + 1, reference, fates, session))));
      list.append(fragment);
      makeReviewList(list);
      return [list, pager({ page, perPage, total, shown: leaks.length })];
    };
    const session = decisionSession(ctx, { slot: listSlot, progress, notice, load });

    root.append(
      viewHead('Leakage', `Images of the evaluated splits that have a copy or near-copy in ${against ? `the reference split (${against})` : 'a split before their own (train, then val, then test)'}. A leaked test image makes a model look better than it is. Keys on a pair: e drops the evaluated copy, r the reference copy, x marks it as not a copy, u undoes.`),
      toolbar, summarySlot, decisionBar(session, progress, notice), listSlot);

    await fill(ctx, listSlot, 'Comparing splits…', () => load(true));
  }

  function leakSummary(summary, reference) {
    if (!summary.length) return null;
    return h('table', { class: 'summary', dataset: { testid: 'leak-summary' } },
      h('caption', {}, `Images with a copy in ${reference}, per evaluated split`),
      h('thead', {}, h('tr', {},
        h('th', { scope: 'col' }, 'Split'), h('th', { scope: 'col' }, 'Images'), h('th', { scope: 'col' }, 'Leaked'),
        h('th', { scope: 'col' }, 'Share'), h('th', { scope: 'col' }, h('span', { class: 'visually-hidden' }, 'Share as a bar')))),
      h('tbody', {}, summary.map((row) => {
        const images = pick(row, 'images', 'total') || 0;
        const leaked = pick(row, 'leaked') || 0;
        const percent = typeof row.leaked_percent === 'number' ? row.leaked_percent : (images ? (100 * leaked) / images : 0);
        return h('tr', {},
          h('th', { scope: 'row' }, row.split),
          h('td', {}, String(images)),
          h('td', {}, String(leaked)),
          h('td', {}, `${percent.toFixed(1)}%`),
          h('td', { class: 'bar-cell' }, h('div', { class: 'meter', 'aria-hidden': 'true' }, h('span', { style: `width:${Math.min(100, percent)}%` }))));
      })));
  }

  function leakPair(leak, number, reference, fates, session) {
    const leaked = imageOf(leak);
    const counterpart = imageOf(pick(leak, 'counterpart', 'reference') || {});
    const seen = new Map([[leaked.path, leak.image_last_decision], [counterpart.path, leak.counterpart_last_decision]]);
    const fate = (img) => fates.has(img.path) ? fates.get(img.path).action : null;
    const headingId = `leak-${number}`;
    const section = h('section', {
      class: `review-item${leak.decided ? ' is-decided' : ''}`,
      'aria-labelledby': headingId,
      dataset: {
        path: leaked.path || '', counterpart: counterpart.path || '', item: `${leaked.path}|${counterpart.path}`, decided: String(Boolean(leak.decided)),
      },
    });
    const decide = (requests, doneText) => session.decide(section, requests, seen, `Pair ${number}: ${doneText}.`);
    return append(section,
      h('header', {}, h('h2', { id: headingId }, `Pair ${number}`),
        leak.decided ? chip('decided', 'decided') : null,
        h('span', { class: 'count' }, `${leaked.split || '?'} image with a copy in ${counterpart.split || reference}`)),
      h('div', { class: 'pair' },
        h('div', {}, h('p', { class: 'side-label' }, `Evaluated (${leaked.split || '?'})`), imageCard(leaked, { decision: fate(leaked) })),
        h('div', { class: 'link' },
          h('span', { class: 'arrow', 'aria-hidden': 'true' }, '⟷'),
          h('span', { class: 'score' }, h('span', { class: 'visually-hidden' }, 'similarity '), formatScore(leak.similarity)),
          tierChip(leak.tier),
          h('span', { class: 'arrow' }, ['cosine similarity', checkText(leak.check)].filter(Boolean).join(' · '))),
        h('div', {}, h('p', { class: 'side-label' }, `Reference (${counterpart.split || reference})`), imageCard(counterpart, { decision: fate(counterpart) }))),
      h('div', { class: 'decide', role: 'group', 'aria-label': `Decide on pair ${number}` },
        decisionButton('e', 'Drop evaluated copy', () => decide([{ action: 'drop', path: leaked.path }], `dropped ${leaked.path}`)),
        decisionButton('r', 'Drop reference copy', () => decide([{ action: 'drop', path: counterpart.path }], `dropped ${counterpart.path}`)),
        decisionButton('x', 'Not a copy', () => decide([{ action: 'distinct', first: leaked.path, second: counterpart.path }], 'marked as not a copy'))));
  }

  // ---------------------------------------------------------- Clusters

  function clusterQuery(params) {
    return { k: params.get('k') || '', seed: params.get('seed') || '' };
  }

  async function renderClusters(ctx) {
    const { params, root } = ctx;
    const q = clusterQuery(params);
    const kInput = h('input', { type: 'number', id: 'cluster-k', min: '2', max: '500', value: q.k, placeholder: 'auto' });
    const seedInput = h('input', { type: 'number', id: 'cluster-seed', min: '0', value: q.seed, placeholder: 'default' });
    const form = h('form', { class: 'toolbar', 'aria-label': 'Cluster settings' },
      h('div', { class: 'field' }, h('label', { for: 'cluster-k' }, 'Clusters (k)'), kInput),
      h('div', { class: 'field' }, h('label', { for: 'cluster-seed' }, 'Seed'), seedInput),
      h('button', { type: 'submit', class: 'primary' }, 'Recompute'));
    form.addEventListener('submit', (event) => {
      event.preventDefault();
      navigate(hrefWith({ k: kInput.value, seed: seedInput.value }));
    });
    const slot = h('div', {});
    root.append(viewHead('Clusters', 'The collection grouped by visual similarity (spherical k-means). Each cluster shows its medoid, a few members, its main labels and its split mix.'), form, slot);

    await fill(ctx, slot, 'Clustering the collection…', async () => {
      const data = await api(collectionPath('/clusters') + queryString(q), { signal: ctx.signal });
      const clusters = listOf(data, 'clusters');
      if (!q.k && typeof data.n_clusters === 'number') kInput.placeholder = `auto: ${data.n_clusters}`;
      if (!q.seed && data.seed !== undefined) seedInput.placeholder = String(data.seed);
      announce(`${clusters.length} clusters.`);
      if (!clusters.length) return emptyState('No clusters.', 'The collection needs a few indexed images first.');
      const list = h('ol', { class: 'cluster-grid', dataset: { testid: 'clusters' }, 'aria-label': 'Clusters' },
        clusters.map((c) => h('li', {}, clusterCard(ctx, c, q))));
      makeReviewList(list);
      return list;
    });
  }

  function splitMix(mix) {
    const rank = (split) => {
      const known = SPLIT_ORDER.indexOf(split);
      return known >= 0 ? known : split === NO_VALUE ? 99 : 50;
    };
    const rows = listOf(mix).map((r) => ({ split: pick(r, 'split', 'name') || NO_VALUE, count: pick(r, 'count') || 0 }))
      .sort((a, b) => rank(a.split) - rank(b.split) || a.split.localeCompare(b.split));
    const total = rows.reduce((sum, r) => sum + r.count, 0) || 1;
    const others = splitNames().filter((name) => !SPLIT_COLOURS[name]);
    const colour = (split) => SPLIT_COLOURS[split] || OTHER_SPLIT_COLOURS[Math.max(0, others.indexOf(split)) % OTHER_SPLIT_COLOURS.length];
    return h('div', {},
      h('div', { class: 'splitmix', 'aria-hidden': 'true' },
        rows.map((r) => h('span', { style: `width:${(100 * r.count) / total}%;background:${colour(r.split)}` }))),
      h('ul', { class: 'legend', 'aria-label': 'Split mix' },
        rows.map((r) => h('li', {}, h('i', { style: `background:${colour(r.split)}`, 'aria-hidden': 'true' }), `${r.split === NO_VALUE ? 'no split' : r.split} ${r.count}`))));
  }

  function topLabels(labels) {
    const rows = listOf(labels).slice(0, 4);
    if (!rows.length) return h('p', { class: 'kv' }, 'No labelled members.');
    return h('ul', { class: 'labels-list', 'aria-label': 'Top labels' }, rows.map((r) => h('li', {},
      h('span', {}, pick(r, 'label', 'name')),
      h('div', { class: 'meter', 'aria-hidden': 'true' }, h('span', { style: `width:${Math.round(100 * (r.share || 0))}%` })),
      h('span', { class: 'share' }, formatPercent(r.share)))));
  }

  const PREVIEW_COUNT = 4;

  function previewLinks(members, medoid) {
    return members.map(imageOf).filter((m) => String(m.id) !== String(medoid.id)).slice(0, PREVIEW_COUNT)
      .map((m) => h('a', { href: href(`/image/${encodeURIComponent(m.id)}`) }, thumb(m, 96, 'preview-img')));
  }

  // Pictures a card fetches for itself (a cluster's members, a label's
  // neighbours) are fetched once it scrolls near the screen, so hundreds of
  // cards cost only the requests of the cards actually looked at.
  let nearScreenObserver = null;
  const nearScreenWork = new WeakMap();
  function whenNearScreen(element, work) {
    if (!nearScreenObserver) {
      nearScreenObserver = new IntersectionObserver((entries) => {
        for (const entry of entries) {
          if (!entry.isIntersecting) continue;
          nearScreenObserver.unobserve(entry.target);
          nearScreenWork.get(entry.target)();
        }
      }, { rootMargin: '300px' });
    }
    nearScreenWork.set(element, work);
    nearScreenObserver.observe(element);
  }

  /** Clusters whose summary lists no members get their first few once seen. */
  function watchForPreview(ctx, card, index, q, medoid) {
    whenNearScreen(card, async () => {
      try {
        const data = await api(collectionPath(`/clusters/${encodeURIComponent(index)}`) + queryString(Object.assign({ page: 1, per_page: PREVIEW_COUNT + 1 }, q)), { signal: ctx.signal });
        card.querySelector('.pictures').append(...previewLinks(listOf(data, 'items', 'members'), medoid));
      } catch (_) {
        // The medoid alone still represents the cluster.
      }
    });
  }

  function clusterCard(ctx, cluster, q) {
    const index = pick(cluster, 'index', 'id');
    const medoid = imageOf(pick(cluster, 'medoid') || {});
    const preview = pick(cluster, 'members_preview', 'preview');
    const open = href(`/clusters/${encodeURIComponent(index)}`, q);
    const headingId = `cluster-${index}`;
    const card = h('section', { class: 'cluster', 'aria-labelledby': headingId, dataset: { index: String(index) } },
      h('header', {},
        h('h2', { id: headingId }, `Cluster ${index}`),
        h('span', { class: 'size' }, `${cluster.size} images`)),
      h('div', { class: 'pictures' },
        medoid.id !== undefined
          ? h('a', { class: 'medoid', href: href(`/image/${encodeURIComponent(medoid.id)}`) }, thumb(medoid, THUMB_SIZE, 'medoid-img'), h('span', { class: 'medoid-tag' }, 'medoid'))
          : null,
        Array.isArray(preview) ? previewLinks(preview, medoid) : null),
      topLabels(pick(cluster, 'top_labels')),
      splitMix(pick(cluster, 'split_mix')),
      h('p', { class: 'kv' }, `Label shares of the ${cluster.labelled_members} labelled members`),
      h('p', { class: 'kv' }, `Tightness ${formatScore(cluster.tightness)} (0: as loose as the whole collection, 1: one picture) · cohesion ${formatScore(cluster.cohesion)}`),
      h('a', { class: 'button', href: open, dataset: { open: String(index) } }, `Open cluster ${index}`));
    if (!Array.isArray(preview) && cluster.size > 1) watchForPreview(ctx, card, index, q, medoid);
    return card;
  }

  async function renderCluster(ctx) {
    const { params, root, arg } = ctx;
    const { page, perPage } = pageParams(params, 60);
    const q = clusterQuery(params);
    const slot = h('div', {});
    const facts = h('div', {});
    root.append(
      h('p', {}, h('a', { href: href('/clusters', q) }, '← All clusters')),
      viewHead(`Cluster ${arg}`, 'Every member, most central first.'),
      facts, slot);
    await fill(ctx, slot, 'Loading members…', async () => {
      const [data, overview] = await Promise.all([
        api(collectionPath(`/clusters/${encodeURIComponent(arg)}`) + queryString(Object.assign({ page, per_page: perPage }, q)), { signal: ctx.signal }),
        api(collectionPath('/clusters') + queryString(q), { signal: ctx.signal }).catch(() => null),
      ]);
      const summary = pick(data, 'cluster', 'summary') ||
        listOf(overview, 'clusters').find((c) => String(pick(c, 'index', 'id')) === String(arg)) || {};
      const members = listOf(data, 'members', 'images', 'items').map(imageOf);
      const total = pick(data, 'total') !== undefined ? pick(data, 'total') : pick(summary, 'size');
      const fact = (label, ...value) => h('div', { class: 'field' }, h('span', {}, label), h('div', {}, value));
      facts.replaceChildren(h('div', { class: 'toolbar cluster-facts' },
        typeof total === 'number' ? fact('Images', h('strong', {}, String(total))) : null,
        summary.tightness !== undefined ? fact('Tightness', h('strong', {}, formatScore(summary.tightness))) : null,
        summary.cohesion !== undefined ? fact('Cohesion', h('strong', {}, formatScore(summary.cohesion))) : null,
        pick(summary, 'top_labels') ? fact('Top labels', topLabels(summary.top_labels)) : null,
        pick(summary, 'split_mix') ? fact('Split mix', splitMix(summary.split_mix)) : null));
      if (!members.length) return emptyState('This cluster has no members on this page.', 'Go back to the first page.');
      return [
        h('ul', { class: 'grid', dataset: { testid: 'cluster-members' } }, members.map((m) => imageCard(m, {
          tag: 'li', score: pick(m, 'similarity'), actions: [searchFromLink(m)],
        }))),
        pager({ page, perPage, total, shown: members.length }),
      ];
    });
  }

  // -------------------------------------------------------- Image detail

  async function renderImage(ctx) {
    const { root, arg } = ctx;
    const meta = await api(collectionPath(`/images/${encodeURIComponent(arg)}`), { signal: ctx.signal });
    const img = imageOf(meta);
    const hashes = pick(meta, 'hashes') || {};
    const hashRows = (Array.isArray(hashes)
      ? hashes.map((x) => [pick(x, 'name', 'algorithm', 'kind') || 'hash', pick(x, 'value', 'hex', 'digest')])
      : Object.entries(hashes))
      .concat([['File hash', meta.content_hash], ['Pixel hash', meta.pixel_hash]].filter(([, v]) => v));
    const modified = typeof meta.modified_unix_ns === 'number'
      ? new Date(meta.modified_unix_ns / 1e6).toISOString().replace('T', ' ').replace(/\.\d+Z$/, ' UTC')
      : undefined;
    const facts = [
      ['Path', img.path],
      ['Root', img.root],
      ['Split', img.split || '(none)'],
      ['Label', img.label || '(none)'],
      ['Size', img.width && img.height ? `${img.width} × ${img.height} px` : undefined],
      ['File size', formatBytes(img.byte_size)],
      ['Modified', modified],
      ['Id', String(img.id)],
      ...hashRows.map(([name, value]) => [name, h('code', {}, String(value))]),
    ].filter(([, value]) => value !== undefined && value !== '');

    const suggestionSlot = h('div', {});
    const neighboursSlot = h('section', { 'aria-labelledby': 'neighbours-head' });
    root.append(
      viewHead(img.path || `Image ${arg}`, null, h('a', { class: 'button primary', href: href('/search', { id: img.id }) }, 'Search with this image')),
      h('div', { class: 'detail' },
        h('img', { class: 'big', src: thumbnailUrl(img.id, DETAIL_SIZE), alt: altText(img), width: img.width, height: img.height }),
        h('div', {},
          h('dl', { class: 'facts' }, facts.map(([k, v]) => [h('dt', {}, k), h('dd', {}, v)])),
          suggestionSlot)),
      neighboursSlot);

    fill(ctx, suggestionSlot, 'Asking the neighbours for a label…', async () => labelSuggestion(ctx, img));
    const head = h('h2', { id: 'neighbours-head' }, 'Nearest neighbours');
    const body = h('div', {});
    neighboursSlot.replaceChildren(h('div', { class: 'section-head' }, head, h('a', { href: href('/search', { id: img.id }) }, 'Filter these in Search →')), body);
    await fill(ctx, body, 'Looking for neighbours…', async () => {
      const data = await api(collectionPath(`/images/${encodeURIComponent(arg)}/neighbours`) + queryString({ k: 12 }), { signal: ctx.signal });
      const hits = listOf(data, 'hits', 'neighbours').map(imageOf).filter((hit) => String(hit.id) !== String(img.id));
      if (!hits.length) return emptyState('No neighbours.', 'This image is alone in the collection.');
      return h('ol', { class: 'grid', dataset: { testid: 'neighbours' } }, hits.map((hit, index) => imageCard(hit, {
        tag: 'li', rank: index + 1, score: pick(hit, 'similarity', 'score'), actions: [searchFromLink(hit)],
      })));
    });
  }

  // Pages of a label listing scanned for one image before giving up.
  const LABEL_SCAN_PAGES = 10;
  const LABEL_PAGE_SIZE = 500;

  /** The entry for `id` in a paged label listing (suggestions or suspects), if any. */
  async function findInListing(ctx, listing, id) {
    for (let page = 1; page <= LABEL_SCAN_PAGES; page += 1) {
      const data = await api(collectionPath(`/labels/${listing}`) + queryString({ id, page, per_page: LABEL_PAGE_SIZE }), { signal: ctx.signal });
      const items = listOf(data, 'items', listing).map(imageOf);
      const found = items.find((item) => String(item.id) === String(id));
      if (found) return { found };
      const total = pick(data, 'total');
      if (items.length < LABEL_PAGE_SIZE || (typeof total === 'number' && page * LABEL_PAGE_SIZE >= total)) return {};
    }
    return { gaveUp: true };
  }

  /**
   * What the labelled neighbours say about one image: a suggestion for an
   * unlabelled image, or a warning when a labelled image's neighbours disagree.
   */
  async function labelSuggestion(ctx, img) {
    const listing = img.label ? 'suspects' : 'suggestions';
    const { found, gaveUp } = await findInListing(ctx, listing, img.id);
    const suggested = found && pick(found, 'suggested_label');
    const confidence = found && pick(found, 'confidence');
    const box = (cls, ...content) => h('div', { class: `suggestion ${cls}`, dataset: { testid: 'suggestion', suggested: suggested || '' } },
      h('h2', {}, 'Label suggestion'), content,
      h('p', { class: 'kv' }, 'From a similarity-weighted vote of labelled neighbours: a hint to review, not a verdict.'));
    if (img.label) {
      if (!found) {
        return box('', h('p', {}, gaveUp
          ? `Labelled “${img.label}”. The list of disputed labels is too long to search here.`
          : `Labelled “${img.label}”; its neighbours do not dispute it.`));
      }
      return box('disagrees',
        h('p', {}, `Labelled “${img.label}”, but ${formatPercent(pick(found, 'disagreement'))} of its neighbours' vote disagrees.`),
        suggested ? h('p', {}, 'They suggest ', h('strong', {}, suggested), ` (${formatPercent(confidence)} of the vote).`) : null);
    }
    if (!found || !suggested) {
      const leading = found && pick(found, 'leading_label');
      return box('', h('p', {}, leading
        ? `No suggestion: “${leading}” leads with only ${formatPercent(confidence)} of the vote.`
        : 'No suggestion: the neighbours do not agree enough on a label.'));
    }
    return box('', h('p', {}, 'Unlabelled. Suggested: ', h('strong', {}, suggested), ` (${formatPercent(confidence)} of the vote).`));
  }

  // ------------------------------------------------------------ Labels

  const LABEL_LISTS = {
    suggestions: {
      title: 'Suggestions',
      lede: 'Unlabelled images with the label the rest of the collection suggests, most certain first. Keys on an image: a accepts the suggestion, r rejects it, u undoes.',
      noun: 'suggestion',
      empty: ['No label to suggest.', 'Every image is labelled, or no unlabelled image resembles one label strongly enough.'],
    },
    suspects: {
      title: 'Suspect labels',
      lede: 'Labelled images whose label the rest of the collection contradicts, most doubtful first. Keys on an image: c confirms its own label, a gives it the label the collection points to, u undoes.',
      noun: 'suspect label',
      empty: ['No label is in doubt.', 'The rest of the collection agrees with every label.'],
    },
  };
  // Neighbours asked for per image, and how many of those carrying the label in question are shown.
  const NEIGHBOUR_POOL = 24;
  const ARGUING_COUNT = 4;

  async function renderLabels(ctx) {
    const { params, root } = ctx;
    const listing = params.get('list') === 'suspects' ? 'suspects' : 'suggestions';
    const about = LABEL_LISTS[listing];
    const { page, perPage } = pageParams(params, 50);
    const slot = h('div', {});
    const { progress, notice } = decisionParts();
    // Kept across refreshes: a decision changes no image's neighbours.
    const neighbourRequests = new Map();

    const load = async () => {
      const [data, log] = await Promise.all([
        api(collectionPath(`/labels/${listing}`) + queryString({ page, per_page: perPage }), { signal: ctx.signal }),
        decisionLog(ctx),
      ]);
      // Where the vote abstained there is no suggestion to decide on.
      const items = listing === 'suggestions' ? data.items.filter((item) => item.suggested_label) : data.items;
      const given = latestByPath(log, ['label', 'reject_suggestion']);
      const latest = latestByPath(log);
      const decided = items.filter((item) => given.has(item.path)).length;
      const paged = page > 1 || data.total > data.items.length;
      progress.textContent = `${decided} of ${items.length} ${about.noun}${items.length === 1 ? '' : 's'}${paged ? ' on this page' : ''} decided`;
      if (!items.length) return emptyState(...about.empty);
      const list = h('ol', { class: 'review-list label-grid', dataset: { testid: listing }, 'aria-label': about.title },
        items.map((item, index) => h('li', {}, labelItem(ctx, item, {
          number: (page - 1) * perPage + index + 1,
          listing,
          given: given.get(item.path),
          seen: new Map([[item.path, latest.get(item.path)?.number || 0]]),
          session,
          neighbourRequests,
        }))));
      makeReviewList(list);
      return [list, pager({ page, perPage, total: data.total, shown: data.items.length })];
    };
    const session = decisionSession(ctx, { slot, progress, notice, load });

    root.append(
      viewHead('Labels', `${about.lede} A label given here is recorded in the store and applied to the training list; folders and files stay as they are.`),
      h('nav', { class: 'tabs', 'aria-label': 'Label lists' }, Object.entries(LABEL_LISTS).map(([name, { title }]) =>
        h('a', { href: href('/labels', { list: name }), 'aria-current': name === listing ? 'page' : null, dataset: { tab: name } }, title))),
      decisionBar(session, progress, notice),
      slot);
    await fill(ctx, slot, `Loading ${about.title.toLowerCase()}…`, load);
  }

  function givenText(given, item) {
    if (given.action === 'reject_suggestion') return 'suggestion rejected';
    return given.label === item.label ? 'label confirmed' : `labelled “${given.label}”`;
  }

  /** One suggestion or suspect beside the neighbours that argue for the label it proposes. */
  function labelItem(ctx, item, { number, listing, given, seen, session, neighbourRequests }) {
    const proposed = item.suggested_label;
    const headingId = `label-item-${number}`;
    const section = h('section', {
      class: `review-item label-item${given ? ' is-decided' : ''}`,
      'aria-labelledby': headingId,
      dataset: {
        item: item.path, path: item.path, proposed: proposed || '', decided: String(Boolean(given)), given: given && given.label ? given.label : '',
      },
    });
    const decide = (requests, doneText) => session.decide(section, requests, seen, `${item.path}: ${doneText}.`);
    const giveLabel = (label) => decide([{ action: 'label', path: item.path, label }], `labelled “${label}”`);
    const suggestion = listing === 'suggestions';
    const strip = h('div', { class: 'neighbour-strip' });
    append(section,
      h('header', {},
        h('h2', { id: headingId }, suggestion
          ? `Suggested: ${proposed}`
          : `Labelled ${item.label}; the collection points to ${proposed || 'no single other label'}`),
        given ? chip(givenText(given, item), 'decided') : null,
        h('span', { class: 'count' }, suggestion
          ? `${formatPercent(item.confidence)} confidence`
          : `${formatPercent(item.disagreement)} disagreement` + (proposed ? ` · “${proposed}” ${formatPercent(item.confidence)}` : ''))),
      h('div', { class: 'label-body' }, imageCard(item), strip),
      h('div', { class: 'decide', role: 'group', 'aria-label': `Decide on ${item.path}` }, suggestion
        ? [decisionButton('a', `Accept “${proposed}”`, () => giveLabel(proposed)),
          decisionButton('r', 'Reject suggestion', () => decide([{ action: 'reject_suggestion', path: item.path }], 'suggestion rejected'))]
        : [decisionButton('c', `Confirm “${item.label}”`, () => giveLabel(item.label)),
          decisionButton('a', proposed ? `Relabel as “${proposed}”` : 'No other label suggested', () => giveLabel(proposed), !proposed)]));
    if (proposed) {
      whenNearScreen(section, () => fill(ctx, strip, 'Finding neighbours…', () => arguingNeighbours(ctx, neighbourRequests, item, proposed)));
    }
    return section;
  }

  /** A few of the image's nearest neighbours labelled `label`: the evidence for that label. */
  async function arguingNeighbours(ctx, requests, item, label) {
    if (!requests.has(item.id)) {
      const request = api(collectionPath(`/images/${encodeURIComponent(item.id)}/neighbours`) + queryString({ k: NEIGHBOUR_POOL }), { signal: ctx.signal });
      // A failed request is made again when the list is next shown.
      request.catch(() => requests.delete(item.id));
      requests.set(item.id, request);
    }
    const { hits } = await requests.get(item.id);
    const arguing = hits.filter((hit) => hit.id !== item.id && hit.label === label).slice(0, ARGUING_COUNT);
    if (!arguing.length) return h('p', { class: 'kv' }, `None of its ${NEIGHBOUR_POOL} nearest neighbours is labelled “${label}”.`);
    return h('figure', { class: 'arguing', dataset: { testid: 'arguing' } },
      h('figcaption', {}, `Nearest neighbours labelled “${label}”`),
      h('ul', {}, arguing.map((hit) => h('li', { dataset: { path: hit.path, label: hit.label } },
        h('a', { href: href(`/image/${encodeURIComponent(hit.id)}`) }, thumb(hit, 88, 'neighbour-img')),
        h('div', { class: 'chips' }, chip(hit.label, 'label')),
        h('span', { class: 'score' }, h('span', { class: 'visually-hidden' }, 'similarity '), formatScore(hit.similarity))))));
  }

  // ------------------------------------------------------------ start

  async function loadCollection(name) {
    state.collection = name;
    state.status = null;
    const stats = document.getElementById('collection-stats');
    stats.textContent = '';
    try {
      state.status = await api(collectionPath('/status'));
      const images = countOf(pick(state.status, 'images', 'image_count'));
      const errors = countOf(pick(state.status, 'errors', 'error_count'));
      const model = pick(state.status, 'model');
      const modelName = typeof model === 'string' ? model : pick(model, 'id', 'name');
      stats.textContent = [
        images !== undefined ? `${images.toLocaleString('en')} images` : null,
        errors ? `${errors} unreadable` : null,
        modelName ? `model ${modelName}` : null,
      ].filter(Boolean).join(' · ');
    } catch (err) {
      stats.textContent = `status unavailable (${err.message})`;
    }
  }

  async function start() {
    // Asked once: every decision is sent with it.
    state.pageKey = api('/page-key').then((data) => data.key, () => '');
    document.addEventListener('keydown', onKeydown);
    document.querySelector('[data-skip]').addEventListener('click', (event) => {
      event.preventDefault();
      document.getElementById('main').focus();
    });
    window.addEventListener('hashchange', route);
    const select = document.getElementById('collection-select');
    try {
      const data = await api('/collections');
      state.collections = listOf(data, 'collections').map((c) => (typeof c === 'string' ? c : pick(c, 'name', 'id'))).filter(Boolean);
    } catch (err) {
      document.getElementById('view').replaceChildren(errorState(err, () => location.reload()));
      return;
    }
    select.replaceChildren(...state.collections.map((name) => h('option', { value: name }, name)));
    select.disabled = state.collections.length < 2;
    const remembered = sessionStorage.getItem('vitrine.collection');
    const first = state.collections.includes(remembered) ? remembered : state.collections[0];
    if (first) {
      select.value = first;
      await loadCollection(first);
    }
    select.addEventListener('change', async () => {
      sessionStorage.setItem('vitrine.collection', select.value);
      state.searchFile = null;
      await loadCollection(select.value);
      navigate(`#${parseHash().path}`);
    });
    if (!location.hash.startsWith('#/')) history.replaceState(null, '', '#/search');
    route();
  }

  start();
})();
