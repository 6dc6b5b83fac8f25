// Loads the operator page in Debian's chromium (driven by playwright-core,
// no browser download) against a running daemon and checks what an
// operator sees. Usage: node page.mjs BASE_URL SCREENSHOT_DIR
// Exit 0 on success, 1 with the reason on stderr otherwise.
import { chromium } from "playwright-core";
import fs from "node:fs";
import os from "node:os";
import path from "node:path";

const [base, shots] = process.argv.slice(2);
if (!base || !shots) {
  console.error("usage: node page.mjs BASE_URL SCREENSHOT_DIR");
  process.exit(2);
}
fs.mkdirSync(shots, { recursive: true });
const profile = fs.mkdtempSync(path.join(os.tmpdir(), "bandwatch-chromium-"));

// The demo (config/demo.toml): pump train P2 at a fixed 1485 rpm, so the
// running speed is 1485/60 = 24.75 Hz; the pump has 7 vanes, so the vane
// pass is 7 x 24.75 = 173.25 Hz (the demo's own scenario).
const SPEED_HZ = 24.75;
const VANE_PASS_HZ = 173.25;
const LINE_HZ = 3.125; // 25 600 Hz / 8192 lines (demo [dsp])
const CHANNELS = ["motor-de", "pump-de", "pump-nde", "tach"];

const problems = [];
const fail = (msg) => { problems.push(msg); };

// A fresh profile directory (playwright passes it as --user-data-dir).
const browser = await chromium.launchPersistentContext(profile, {
  executablePath: process.env.CHROMIUM || "/usr/bin/chromium",
  headless: true,
  timeout: 30000,
  viewport: { width: 1280, height: 800 },
  args: ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync"],
});
try {
  const page = await browser.newPage();
  page.setDefaultTimeout(15000);
  const consoleErrors = [];
  const foreign = [];
  page.on("console", (m) => { if (m.type() === "error") consoleErrors.push(m.text()); });
  page.on("pageerror", (e) => consoleErrors.push(`uncaught: ${e.message}`));
  page.on("request", (r) => {
    const u = new URL(r.url());
    if (u.protocol !== "data:" && u.origin !== new URL(base).origin) foreign.push(r.url());
  });

  // Overview.
  const t0 = Date.now();
  await page.goto(`${base}/`, { waitUntil: "load" });
  const loadMs = Date.now() - t0;
  // Waits by selector, not waitForFunction: that evaluates a string, which
  // the page's CSP (no 'unsafe-eval') rightly refuses.
  await page.locator("#channels tbody tr").nth(CHANNELS.length - 1).waitFor();
  const listed = await page.$$eval("#channels tbody tr", (rows) => rows.map((r) => r.dataset.channel));
  for (const c of CHANNELS) if (!listed.includes(c)) fail(`overview does not list channel ${c} (lists ${listed})`);
  const machineText = await page.textContent("#machines tbody");
  if (!/1485\s*rpm/.test(machineText)) fail(`machines table does not show 1485 rpm: ${machineText}`);
  const lossRows = await page.$$eval("#losses tbody tr", (r) => r.length);
  if (lossRows === 0) fail("lost-data table is empty");
  // Keyboard focus on a channel link survives the live updates (1.5 s).
  await page.focus('#channels a[href="#/channel/motor-de"]');
  await page.waitForTimeout(2000);
  const focused = await page.evaluate(() => document.activeElement && document.activeElement.getAttribute("href"));
  if (focused !== "#/channel/motor-de") fail(`focus lost by the overview's update (now on ${focused})`);
  await page.screenshot({ path: path.join(shots, "overview.png"), fullPage: true });

  // Channel view of pump-de, reached by keyboard-free navigation (its link).
  await page.click('nav a[href="#/channel/pump-de"]');
  await page.locator('#peak-readout[data-hz]:not([data-hz=""])').waitFor();
  // Full span (the label is the highest peak of the whole spectrum).
  const peakHz = Number(await page.getAttribute("#peak-readout", "data-hz"));
  if (!(Math.abs(peakHz - VANE_PASS_HZ) <= LINE_HZ / 2)) {
    fail(`highest peak at ${peakHz} Hz, expected the vane pass ${VANE_PASS_HZ} Hz within half a line`);
  }
  const peakText = await page.textContent("#peak-readout");
  if (!/highest peak 17[23]\.\d Hz/.test(peakText)) fail(`peak label reads "${peakText}"`);
  const harm = (await page.getAttribute("#harmonic-readout", "data-hz")).split(",").map(Number);
  if (harm.length < 5) fail(`only ${harm.length} harmonic cursors`);
  harm.forEach((f, i) => {
    if (Math.abs(f - (i + 1) * SPEED_HZ) > 1e-9) fail(`harmonic cursor ${i + 1} at ${f} Hz, expected ${(i + 1) * SPEED_HZ}`);
  });
  // The plot has ink on it: the canvas is not blank.
  const inked = await page.$eval("#spectrum", (c) => {
    const d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
    let dark = 0;
    for (let i = 0; i < d.length; i += 4) if (d[i] < 80 && d[i + 1] < 80 && d[i + 2] < 80) dark++;
    return dark;
  });
  if (inked < 500) fail(`spectrum canvas has only ${inked} dark pixels`);
  // Cursor by keyboard: focus the plot, move one line right.
  await page.focus("#spectrum");
  await page.keyboard.press("ArrowRight");
  const cursorText = await page.textContent("#cursor-readout");
  if (!/cursor [\d.]+ Hz · order [\d.]+ · /.test(cursorText)) fail(`cursor readout "${cursorText}"`);
  await page.screenshot({ path: path.join(shots, "channel-pump-de.png"), fullPage: true });
  // Zoom on the vane pass with the wheel, log amplitude.
  await page.selectOption("#amp-scale", "log");
  const box = await page.$eval("#spectrum", (c) => { const r = c.getBoundingClientRect(); return { x: r.x, y: r.y, w: r.width, h: r.height }; });
  await page.mouse.move(box.x + 64 + (box.w - 80) * (VANE_PASS_HZ / 12800), box.y + box.h / 2);
  for (let i = 0; i < 12; i++) await page.mouse.wheel(0, -100);
  await page.waitForTimeout(300);
  await page.screenshot({ path: path.join(shots, "channel-pump-de-zoom-log.png"), fullPage: true });

  // Display decimation: 65 537 lines into ~1000 pixel columns, one line
  // of 1.0 among lines of 0.001; the spike's column must reach the top.
  // The plot module runs in the page (its CSP allows /assets/ modules).
  const dec = await page.evaluate(async () => {
    const { SpectrumPlot } = await import("/assets/plot.js");
    const c = document.createElement("canvas");
    c.style.width = "1064px"; c.style.height = "300px";
    document.body.append(c);
    const p = new SpectrumPlot(c, () => {});
    const n = 65537, spike = 40001, values = new Float32Array(n).fill(0.001);
    values[spike] = 1.0;
    const t = performance.now();
    p.setData({ f0: 0, df: 0.390625, values, unit: "g" });
    const ms = performance.now() - t;
    const x = Math.round(p.xOf(spike * 0.390625));
    const box = p.plotBox(), dpr = window.devicePixelRatio || 1;
    const g = c.getContext("2d");
    // Dark pixels in the spike's column over the top tenth of the plot.
    const darkAt = (x0) => {
      let dark = 0;
      for (let dx = -1; dx <= 1; dx++) {
        const col = g.getImageData((x0 + dx) * dpr, (box.y + box.h * 0.12) * dpr, 1, box.h * 0.1 * dpr).data;
        for (let i = 0; i < col.length; i += 4) if (col[i] < 100) dark++;
      }
      return dark;
    };
    // Control: 40 px to the left there is only the noise floor.
    const dark = darkAt(x), control = darkAt(x - 40);
    c.remove();
    return { ms, dark, control, peakHz: p.peak.hz };
  });
  if (dec.control !== 0) fail(`decimation check: ${dec.control} dark pixels where only the floor is`);
  if (dec.dark < 3) fail(`a one-line spike among 65537 lines is not drawn (${dec.dark} dark pixels in its column)`);
  if (Math.abs(dec.peakHz - 40001 * 0.390625) > 0.2) fail(`65537-line peak at ${dec.peakHz} Hz`);
  console.log(`65537-line spectrum drawn in ${dec.ms.toFixed(1)} ms (one draw, headless, no GPU)`);

  if (consoleErrors.length) fail(`console errors: ${consoleErrors.join(" | ")}`);
  if (foreign.length) fail(`requests outside the daemon: ${foreign.join(", ")}`);
  console.log(`page load (DOM load event) ${loadMs} ms; peak ${peakHz.toFixed(2)} Hz; harmonics ${harm.slice(0, 3).join(", ")}...`);
} finally {
  await browser.close();
  fs.rmSync(profile, { recursive: true, force: true });
}
if (problems.length) {
  for (const p of problems) console.error(`page: FAIL: ${p}`);
  process.exit(1);
}
console.log("page: all checks passed");
