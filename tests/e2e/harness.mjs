// Shared by the page test and the render benchmark: runs the real `vitrine`
// binary and a headless Chromium that may only talk to this machine.

import assert from 'node:assert/strict';
import { spawn } from 'node:child_process';
import fs from 'node:fs';
import net from 'node:net';
import os from 'node:os';
import path from 'node:path';
import { fileURLToPath } from 'node:url';

import { chromium } from 'playwright-core';

export const repoRoot = path.resolve(path.dirname(fileURLToPath(import.meta.url)), '..', '..');
export const artifactsDir = path.join(repoRoot, 'artifacts', 'e2e');
export const vitrineBin = path.resolve(repoRoot, process.env.VITRINE_BIN || 'target/debug/vitrine');
const chromiumPath = process.env.CHROMIUM_BIN || '/usr/bin/chromium';

/** Runs `vitrine args...`, resolving with its output; rejects with it on a non-zero exit. */
export function runVitrine(bin, args, { timeoutMs = 20 * 60 * 1000 } = {}) {
  assert.ok(fs.existsSync(bin), `${bin} does not exist: build it first (cargo build -p vitrine-cli) or set VITRINE_BIN`);
  return new Promise((resolve, reject) => {
    const child = spawn(bin, args, { stdio: ['ignore', 'pipe', 'pipe'] });
    let output = '';
    child.stdout.on('data', (d) => { output += d; });
    child.stderr.on('data', (d) => { output += d; });
    const timer = setTimeout(() => child.kill('SIGKILL'), timeoutMs);
    child.on('error', reject);
    child.on('close', (code, signal) => {
      clearTimeout(timer);
      if (code === 0) resolve(output);
      else reject(new Error(`vitrine ${args.join(' ')} exited with ${code ?? signal}:\n${output}`));
    });
  });
}

export async function indexCollection(bin, store, folder) {
  const log = await runVitrine(bin, ['--store', store, 'index', folder]);
  fs.mkdirSync(artifactsDir, { recursive: true });
  fs.writeFileSync(path.join(artifactsDir, 'index.log'), log);
}

/** A TCP port that nothing listens on right now (the OS picks it). */
function freePort() {
  return new Promise((resolve, reject) => {
    const probe = net.createServer();
    probe.unref();
    probe.on('error', reject);
    probe.listen(0, '127.0.0.1', () => {
      const { port } = probe.address();
      probe.close(() => resolve(port));
    });
  });
}

/** Starts `vitrine --store STORE serve` on a free loopback port and waits for /readyz. */
export async function startServer(bin, store, { readyTimeoutMs = 5 * 60 * 1000 } = {}) {
  const port = await freePort();
  const child = spawn(bin, ['--store', store, 'serve', '--port', String(port)], {
    stdio: ['ignore', 'pipe', 'pipe'],
  });
  fs.mkdirSync(artifactsDir, { recursive: true });
  const log = fs.createWriteStream(path.join(artifactsDir, 'server.log'));
  child.stdout.pipe(log);
  child.stderr.pipe(log);
  let exited = null;
  child.on('exit', (code, signal) => { exited = code ?? signal; });

  const url = `http://127.0.0.1:${port}`;
  const deadline = Date.now() + readyTimeoutMs;
  for (;;) {
    if (exited !== null) throw new Error(`vitrine serve exited with ${exited}; see ${path.join(artifactsDir, 'server.log')}`);
    try {
      const response = await fetch(`${url}/readyz`);
      if (response.ok) break;
    } catch (_) {
      // Not listening yet.
    }
    if (Date.now() > deadline) {
      child.kill('SIGKILL');
      throw new Error(`vitrine serve was not ready within ${readyTimeoutMs / 1000} s`);
    }
    await new Promise((r) => setTimeout(r, 250));
  }

  return {
    url,
    async stop() {
      if (exited !== null) return;
      const gone = new Promise((r) => child.once('exit', r));
      child.kill('SIGTERM');
      const timer = setTimeout(() => child.kill('SIGKILL'), 10_000);
      await gone;
      clearTimeout(timer);
    },
  };
}

/**
 * Debian's Chromium, headless, in a fresh profile, with every feature that
 * would call home switched off. Resolves with { page, close }.
 */
export async function launchBrowser() {
  assert.ok(fs.existsSync(chromiumPath), `${chromiumPath} is missing: apt-get install chromium chromium-driver`);
  const profile = fs.mkdtempSync(path.join(os.tmpdir(), 'vitrine-e2e-profile-'));
  const context = await chromium.launchPersistentContext(profile, {
    executablePath: chromiumPath,
    headless: true,
    acceptDownloads: true,
    viewport: { width: 1360, height: 900 },
    args: [
      '--headless',
      '--no-sandbox',
      '--disable-gpu',
      '--disable-quic',
      '--no-first-run',
      '--disable-background-networking',
      '--disable-component-update',
      '--disable-sync',
    ],
  });
  const page = context.pages()[0] || await context.newPage();
  return {
    page,
    async close() {
      await context.close();
      fs.rmSync(profile, { recursive: true, force: true });
    },
  };
}

const LOOPBACK_HOSTS = new Set(['127.0.0.1', 'localhost', '[::1]']);

/** Fails unless every URL is served by this machine (data: URLs never touch the network). */
export function assertLoopbackOnly(urls) {
  const outside = urls.filter((raw) => {
    const url = new URL(raw);
    if (url.protocol === 'data:') return false;
    // blob:http://127.0.0.1:port/uuid belongs to the page's own origin.
    const origin = url.protocol === 'blob:' ? new URL(url.pathname) : url;
    return !['http:', 'https:'].includes(origin.protocol) || !LOOPBACK_HOSTS.has(origin.hostname);
  });
  assert.deepEqual(outside, [], 'requests that left the loopback address');
}
