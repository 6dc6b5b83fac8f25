// Loads the operator page in Debian's chromium (driven by playwright-core,
// no browser download) against a running daemon and checks what an
// operator sees. Usage: node page.mjs BASE_URL SCREENSHOT_DIR FAST_URL TOKEN_FILE
// BASE_URL runs the demo as shipped; FAST_URL the demo with its simulator
// sped up 10 times (its bearing defect trips the BPFO alarm within
// seconds), whose token is in TOKEN_FILE.
// Exit 0 on success, 1 with the reason on stderr otherwise.
import { chromium } from "playwright-core";
import fs from "node:fs";
import os from "node:os";
import path from "node:path";

const [base, shots, fast, tokenFile] = process.argv.slice(2);
if (!base || !shots || !fast || !tokenFile) {
  console.error("usage: node page.mjs BASE_URL SCREENSHOT_DIR FAST_URL TOKEN_FILE");
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

// Dark pixels on a canvas: the plot has ink on it, not only its frame.
async function inkOf(page, sel) {
  return page.$eval(sel, (c) => {
    const d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
    let dark = 0;
    for (let i = 0; i < d.length; i += 4) if (d[i] < 80 && d[i + 1] < 80 && d[i + 2] < 80) dark++;
    return dark;
  });
}

// Clicks a download link and checks what arrives: CSV with a header and
// numeric rows; SVG that parses as XML (in the page's own DOMParser) and
// names the channel; BWF1 by its magic.
async function checkDownload(page, sel, kind, channelName) {
  const [dl] = await Promise.all([page.waitForEvent("download"), page.click(sel)]);
  const file = await dl.path();
  const bytes = fs.readFileSync(file);
  const name = dl.suggestedFilename();
  if (kind === "csv") {
    const lines = bytes.toString("utf8").trim().split(/\r?\n/);
    const rows = lines.slice(1).map((l) => l.split(",").map(Number));
    if (lines.length < 100) fail(`${sel}: CSV has ${lines.length} lines`);
    if (!/[a-z]/i.test(lines[0])) fail(`${sel}: CSV has no header: ${lines[0]}`);
    if (rows.some((r) => r.some((v) => !Number.isFinite(v)))) fail(`${sel}: CSV has a non-numeric cell`);
    if (!name.endsWith(".csv")) fail(`${sel}: file name ${name}`);
  } else if (kind === "svg") {
    const text = bytes.toString("utf8");
    // Parsed in a blank page of its own: the file is a download, not part
    // of the operator page (whose CSP is not the subject here).
    const blank = await page.context().newPage();
    const res = await blank.evaluate((t) => {
      const doc = new DOMParser().parseFromString(t, "image/svg+xml");
      return { error: doc.querySelector("parsererror") !== null, root: doc.documentElement.nodeName, text: doc.documentElement.textContent };
    }, text);
    await blank.close();
    if (res.error || res.root !== "svg") fail(`${sel}: SVG does not parse (root ${res.root})`);
    if (channelName && !res.text.includes(channelName)) fail(`${sel}: SVG does not name ${channelName}`);
    if (!name.endsWith(".svg")) fail(`${sel}: file name ${name}`);
  } else if (kind === "bwf1") {
    if (bytes.length < 64 || bytes.subarray(0, 4).toString("latin1") !== "BWF1") fail(`${sel}: not a BWF1 file (${bytes.length} bytes)`);
  }
  console.log(`download ${name}: ${bytes.length} bytes, ${kind} ok`);
}

// A fresh profile directory (playwright passes it as --user-data-dir).
const browser = await chromium.launchPersistentContext(profile, {
  executablePath: process.env.CHROMIUM || "/usr/bin/chromium",
  headless: true,
  timeout: 30000,
  viewport: { width: 1280, height: 800 },
  acceptDownloads: true,
  args: ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync"],
});
try {
  const page = await browser.newPage();
  page.setDefaultTimeout(15000);
  const consoleErrors = [];
  const foreign = [];
  // The one error the browser itself logs on purpose: the refused
  // acknowledge with a wrong token (a 401 answer to that POST).
  let expected401 = 0;
  page.on("console", (m) => {
    if (m.type() !== "error") return;
    if (expected401 > 0 && /status of 401/.test(m.text()) && /\/ack$/.test(m.location().url)) { expected401--; return; }
    consoleErrors.push(m.text());
  });
  page.on("pageerror", (e) => consoleErrors.push(`uncaught: ${e.message}`));
  page.on("request", (r) => {
    const u = new URL(r.url());
    if (u.protocol !== "data:" && u.origin !== new URL(base).origin && u.origin !== new URL(fast).origin) foreign.push(r.url());
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
  // The daemon calls a channel's health unknown (no_data) until its first
  // seconds of data are judged; the picture is taken once all read OK.
  await page.locator('#channels tbody tr td:has-text("fault: no_data")').first().waitFor({ state: "detached", timeout: 20000 })
    .catch(() => fail("a channel still reads no_data 20 s after start"));
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

  // --- Channel view, the rest: waveform, band signal, units, envelope,
  // trend, and the downloads of what is shown (CSV and SVG parse).
  await page.selectOption("#amp-scale", "lin");
  await page.click("#zoom-reset");
  await page.locator('#wave-facts:has-text("samples at")').waitFor();
  const waveInk = await inkOf(page, "#waveform");
  if (waveInk < 300) fail(`waveform canvas has only ${waveInk} dark pixels`);
  const units = await page.$$eval("#spec-unit option", (o) => o.map((x) => x.value));
  for (const u of ["g", "m/s^2", "mm/s", "um"]) if (!units.includes(u)) fail(`unit ${u} not offered (offered: ${units})`);
  await page.selectOption("#spec-unit", "mm/s");
  await page.locator('#channel-facts:has-text("rms mm/s")').waitFor();
  // The envelope spectrum (pump-de's BPFO band and its alarm limits).
  await page.selectOption("#spec-unit", "g");
  await page.selectOption("#spec-kind", "envelope");
  await page.locator('#channel-facts:has-text("envelope spectrum")').waitFor();
  await page.selectOption("#wave-kind", "band:vane-pass");
  await page.locator('#wave-facts:has-text("band vane-pass signal")').waitFor();
  await page.waitForTimeout(2500); // a few trend points
  await page.screenshot({ path: path.join(shots, "channel-pump-de-envelope.png"), fullPage: true });
  const trendInk = await inkOf(page, "#trend");
  if (trendInk < 50) fail(`trend canvas has only ${trendInk} dark pixels`);
  for (const [link, kind] of [["spectrum CSV", "csv"], ["spectrum SVG", "svg"], ["waveform CSV", "csv"], ["waveform SVG", "svg"]]) {
    await checkDownload(page, `#channel a.download:text-is("${link}")`, kind, "pump-de");
  }

  // --- History of pump-de (config/demo.toml [history]: a trend row every
  // second, a stored spectrum every 20 s). Waits (bounded) until the file
  // holds two spectra, then opens the view from the channel view's link.
  const histApi = `${base}/api/v1/history/channels/pump-de`;
  // How many entries of `key` are not null.
  const countOf = async (url, key) => {
    const r = await fetch(url, { signal: AbortSignal.timeout(5000) }).catch(() => null);
    return r && r.ok ? (await r.json())[key].filter((v) => v !== null).length : 0;
  };
  let storedCount = 0, rowCount = 0;
  for (const until = Date.now() + 70000; Date.now() < until;) {
    storedCount = await countOf(`${histApi}/spectra`, "spectra");
    rowCount = await countOf(`${histApi}/trend?series=bpfo&from=-1h`, "mean");
    if (storedCount >= 2 && rowCount >= 4) break;
    await new Promise((ok) => setTimeout(ok, 1000));
  }
  if (storedCount < 2) fail(`only ${storedCount} spectra stored 70 s into the demo (spectrum_every_s = 20)`);
  if (rowCount < 4) fail(`only ${rowCount} trend rows with a value stored 70 s into the demo (interval_s = 1)`);
  await page.click("#channel-history");
  await page.locator("#sp-table tbody button[data-id]").first().waitFor({ timeout: 20000 });
  await page.locator('#hist-waterfall[data-rows]').waitFor({ timeout: 20000 });
  await page.locator('#hist-trend[data-points]').waitFor();
  const histPoints = Number(await page.getAttribute("#hist-trend", "data-points"));
  if (histPoints < 4) fail(`history trend draws ${histPoints} points, the API had ${rowCount} (a row every second)`);
  if (!/^bpfo /.test(await page.textContent("#hist-trend-facts"))) fail("the history view does not open on pump-de's alarm (bpfo)");
  const histInk = await inkOf(page, "#hist-trend");
  if (histInk < 200) fail(`history trend canvas has only ${histInk} dark pixels`);
  // The waterfall's cells: colours of the palette, never grey (the page's
  // background, grid and text are all greys).
  const coloured = (sel) => page.$eval(sel, (c) => {
    const d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
    let n = 0;
    for (let i = 0; i < d.length; i += 4) if (Math.max(d[i], d[i + 1], d[i + 2]) - Math.min(d[i], d[i + 1], d[i + 2]) > 12) n++;
    return n;
  });
  const wfCells = await coloured("#hist-waterfall");
  if (wfCells < 5000) fail(`waterfall canvas has only ${wfCells} coloured pixels`);
  if ((await coloured("#hist-legend")) < 500) fail("the waterfall's colour scale is not drawn");
  const wfRows = Number(await page.getAttribute("#hist-waterfall", "data-rows"));
  if (wfRows < 2) fail(`waterfall has ${wfRows} rows`);
  // Both colour maps run dark to light: CIE 1976 L* (from sRGB by IEC
  // 61966-2-1, D65 white; formulas from memory) rises along each ramp,
  // so lightness alone orders the levels (colour-blind-safe option).
  const lstar = await page.evaluate(async () => {
    const { PALETTES, colourAt } = await import("/assets/histplot.js");
    const lin = (c) => { const v = c / 255; return v <= 0.04045 ? v / 12.92 : ((v + 0.055) / 1.055) ** 2.4; };
    const out = {};
    for (const [k, p] of Object.entries(PALETTES)) {
      out[k] = [];
      for (let i = 0; i <= 100; i++) {
        const [r, g, b] = colourAt(p.stops, i / 100);
        const y = 0.2126 * lin(r) + 0.7152 * lin(g) + 0.0722 * lin(b);
        out[k].push(y > 216 / 24389 ? 116 * Math.cbrt(y) - 16 : (24389 / 27) * y);
      }
    }
    return out;
  });
  for (const [k, ls] of Object.entries(lstar)) {
    for (let i = 1; i < ls.length; i++) if (!(ls[i] > ls[i - 1])) fail(`palette ${k}: L* does not rise at ${i}% (${ls[i - 1].toFixed(1)} -> ${ls[i].toFixed(1)})`);
    if (ls[ls.length - 1] - ls[0] < 60) fail(`palette ${k}: L* spans only ${(ls[ls.length - 1] - ls[0]).toFixed(1)}`);
  }
  if (!lstar["blue-yellow"]) fail("no colour-blind-safe palette offered");
  const projText = await page.textContent("#hist-projection");
  if (!/projection|no alarm/.test(projText)) fail(`projection readout "${projText}"`);
  if (!/guidance/.test(await page.textContent("#history-caution"))) fail("history caution missing");
  await page.screenshot({ path: path.join(shots, "history-pump-de.png"), fullPage: true });
  await page.selectOption("#wf-palette", "blue-yellow");
  await page.fill("#wf-fmin", "0");
  await page.fill("#wf-fmax", "1000");
  await page.click("#wf-apply");
  await page.locator('#wf-facts:has-text("Hz in")').waitFor();
  await page.waitForTimeout(500);
  if (!/^0–1000 Hz|^0–99\d/.test((await page.textContent("#wf-facts")).split(" · ")[1] || "")) {
    fail(`waterfall crop reads "${await page.textContent("#wf-facts")}"`);
  }
  // One stored spectrum, opened from the list, is plotted.
  await page.locator("#sp-table tbody button[data-id]").first().click();
  await page.locator("#hist-spectrum[data-shown]").waitFor();
  const spInk = await inkOf(page, "#hist-spectrum");
  if (spInk < 300) fail(`stored spectrum plot has only ${spInk} dark pixels`);
  if (!/stored #\d+ at /.test(await page.textContent("#sp-facts"))) fail(`stored spectrum facts "${await page.textContent("#sp-facts")}"`);
  await page.screenshot({ path: path.join(shots, "history-pump-de-spectrum.png"), fullPage: true });

  // --- Alarms on the sped-up demo: BPFO trips to danger (latched). The
  // wrong token is entered first, so that both acknowledges come within a
  // second of the trip, while the simulated defect is still in danger.
  await page.goto(`${fast}/#/alarms`, { waitUntil: "load" });
  await page.fill("#token-input", "not-the-token");
  await page.click('#token-form button[type="submit"]');
  const bpfoRow = page.locator('#alarm-table tbody tr[data-key="pump-de/bpfo"]');
  const ackButton = bpfoRow.locator('button[data-act="ack"]');
  await bpfoRow.and(page.locator('[data-state="danger"]')).waitFor({ timeout: 60000 });
  await ackButton.waitFor();
  const rowText = await bpfoRow.textContent();
  if (!/◆\s*danger/.test(rowText) || !/latched/.test(rowText)) fail(`BPFO row reads "${rowText}"`);
  if (!(await page.textContent("#alarm-caution")).includes("not a machinery protection")) fail("alarm caution missing");
  // The wrong token: refused, and said so.
  expected401 = 1;
  await ackButton.click();
  await page.locator('#alarm-message[data-outcome="refused"]').waitFor();
  const refusal = await page.textContent("#alarm-message");
  if (!/refused: the token was not accepted/.test(refusal)) fail(`wrong token message "${refusal}"`);
  await page.screenshot({ path: path.join(shots, "alarms-refused.png"), fullPage: true });
  // The right token, kept only in the tab's session storage.
  const good = fs.readFileSync(tokenFile, "utf8").trim();
  await page.fill("#token-input", good);
  await page.click('#token-form button[type="submit"]');
  const stored = await page.evaluate(() => sessionStorage.getItem("bandwatch.token"));
  if (stored !== good) fail("the token is not kept in session storage");
  if (await page.evaluate(() => localStorage.length) !== 0) fail("something was put in local storage");
  if (page.url().includes(good)) fail("the token shows in the address");
  await ackButton.click();
  await page.locator('#alarm-message[data-outcome="ok"]').waitFor();
  // Acknowledged: shown as such while the defect stays in danger; once it
  // has cleared, an acknowledged latch lets go and the row reads normal.
  // Either way the button is gone and the journal lists the acknowledge.
  await ackButton.waitFor({ state: "detached" });
  const after = await bpfoRow.textContent();
  const afterState = await bpfoRow.getAttribute("data-state");
  if (!/acknowledged/.test(after) && afterState !== "normal") fail(`after acknowledge the BPFO row reads "${after}"`);
  console.log(`after acknowledge: ${afterState}, "${after.replace(/\s+/g, " ").slice(0, 90)}"`);
  await page.locator('#event-table tbody tr:has(td:text-is("bpfo")):has-text("ack")').first().waitFor();
  await page.screenshot({ path: path.join(shots, "alarms.png"), fullPage: true });

  // --- A capture: its spectrum and waveform drawn, its downloads parse.
  await page.locator('#event-table a:text-is("show capture")').first().waitFor({ timeout: 30000 });
  await page.locator('#event-table a:text-is("show capture")').first().click();
  await page.locator('#capture-waveform-facts:has-text("samples at")').waitFor();
  const capSpec = await inkOf(page, "#capture-spectrum");
  const capWave = await inkOf(page, "#capture-waveform");
  if (capSpec < 300) fail(`capture spectrum has only ${capSpec} dark pixels`);
  if (capWave < 300) fail(`capture waveform has only ${capWave} dark pixels`);
  if (!/pump-de|motor-de|pump-nde/.test(await page.textContent("#capture-facts"))) fail("capture facts name no channel");
  await page.screenshot({ path: path.join(shots, "capture.png"), fullPage: true });
  for (const [link, kind] of [["spectrum CSV", "csv"], ["spectrum SVG", "svg"], ["waveform CSV", "csv"], ["raw capture (BWF1)", "bwf1"]]) {
    await checkDownload(page, `#capture-downloads a:text-is("${link}")`, kind, null);
  }

  // --- History on the sped-up demo with the token (kept in this tab by
  // the alarm step): store the live spectrum now, mark it as reference,
  // compare the shown spectrum with it (overlay, dB per line and band).
  await page.goto(`${fast}/#/history/pump-de`, { waitUntil: "load" });
  await page.locator("#sp-table tbody button[data-id]").first().waitFor({ timeout: 30000 });
  await page.click("#sp-store");
  await page.locator('#sp-message[data-outcome="ok"]').waitFor();
  const storedMsg = await page.textContent("#sp-message");
  const newId = (storedMsg.match(/#(\d+)/) || [])[1];
  if (!newId) fail(`store now says "${storedMsg}"`);
  // The stored one is shown at once (the sped-up simulator's clock runs
  // ahead of the PC's, so the list up to "now" may not hold it yet).
  await page.locator(`#hist-spectrum[data-shown="${newId}"]`).waitFor();
  await page.click("#sp-reference");
  await page.locator('#sp-message:has-text("is now the reference")').waitFor();
  const marked = await (await fetch(`${fast}/api/v1/history/spectra/${newId}`, { signal: AbortSignal.timeout(5000) })).json();
  if (!(marked.stored && marked.stored.reference === true)) fail(`#${newId} is not marked as reference in the API after the click`);
  await page.locator('#sp-facts:has-text("the reference")').waitFor();
  await page.selectOption("#cmp-of", "live");
  await page.locator("#cmp:not([hidden])").waitFor();
  await page.locator("#cmp-bands tbody tr").first().waitFor();
  const cmpRows = await page.$$eval("#cmp-bands tbody tr", (r) => r.map((x) => x.textContent));
  if (!cmpRows.some((t) => /\d dB/.test(t))) fail(`compare band table: ${cmpRows.join(" | ")}`);
  if ((await inkOf(page, "#cmp-db")) < 200) fail("the dB difference plot is blank");
  await page.screenshot({ path: path.join(shots, "history-compare.png"), fullPage: true });

  // --- A 10-inch tablet held upright (800 x 1280 CSS px): every view fits
  // the width (no sideways scrolling).
  await page.setViewportSize({ width: 800, height: 1280 });
  for (const [hash, ready, shot] of [["#/", "#channels tbody tr", "tablet-overview.png"],
    ["#/channel/pump-de", '#peak-readout[data-hz]:not([data-hz=""])', "tablet-channel.png"],
    ["#/alarms", "#alarm-table tbody tr", "tablet-alarms.png"],
    ["#/history/pump-de", "#sp-table tbody button[data-id]", "tablet-history.png"]]) {
    await page.goto(`${fast}/${hash}`, { waitUntil: "load" });
    await page.locator(ready).first().waitFor();
    await page.waitForTimeout(300);
    const { sw, iw } = await page.evaluate(() => ({ sw: document.documentElement.scrollWidth, iw: window.innerWidth }));
    if (sw > iw + 1) fail(`${hash} at 800 px wide scrolls sideways (${sw} px of content)`);
    await page.screenshot({ path: path.join(shots, shot), fullPage: true });
  }

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
