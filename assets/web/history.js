// History view of one channel (#/history/NAME), over the stored history
// (docs/history.md "Queries"): a series' trend over a chosen range with
// its limits, holes and the projection to the limits; the waterfall of
// the stored spectra; the list of stored spectra, one plotted on choice;
// store now and mark as reference (the tab's token, as the alarm page
// keeps it); comparison with the channel's reference. Polls every 5 s.

import * as api from "./api.js";
import { el, num, badge, poller, download } from "./ui.js";
import { SpectrumPlot } from "./plot.js";
import { HistoryTrendPlot, WaterfallPlot, PALETTES } from "./histplot.js";
import { token } from "./alarms.js";

// A band's difference as shown: one decimal, a sign, never "-0.0".
function signedDb(db) {
  if (db == null || !Number.isFinite(db)) return "–";
  const t = db.toFixed(1);
  return t === "0.0" || t === "-0.0" ? "±0.0 dB" : `${db > 0 ? "+" : ""}${t} dB`;
}

const PERIOD_MS = 5000;
const $ = (id) => document.getElementById(id);
const OVERALL = [
  ["overall-rms", "overall RMS"], ["overall-peak", "overall peak"], ["overall-peak-to-peak", "overall peak-to-peak"],
  ["overall-crest-factor", "overall crest factor"], ["overall-mean", "overall mean"],
];

let trendPlot = null;
let wf = null;
let spPlot = null;
let dbPlot = null;
let current = null; // { name, detail, shownId, ... }

const secs = (iso) => (iso ? Date.parse(iso) / 1000 : null);

// A duration in words: "3 min 20 s", "2.5 h", "4.1 d".
export function span(s) {
  if (s == null || !Number.isFinite(s)) return "–";
  const a = Math.abs(s);
  if (a < 120) return `${Math.round(s)} s`;
  if (a < 7200) return `${Math.floor(s / 60)} min ${Math.round(s % 60)} s`;
  if (a < 172800) return `${(s / 3600).toFixed(1)} h`;
  return `${(s / 86400).toFixed(1)} d`;
}

function fill(select, options) {
  const sig = options.map(([v, t]) => `${v}=${t}`).join("\n");
  if (select.dataset.sig === sig) return;
  const keep = select.value;
  select.dataset.sig = sig;
  select.replaceChildren(...options.map(([v, t]) => el("option", { value: v, text: t })));
  if (options.some(([v]) => v === keep)) select.value = keep;
}

function say(ok, text) {
  const m = $("sp-message");
  m.replaceChildren(ok ? el("span", { text }) : badge("fault", text));
  m.dataset.outcome = ok ? "ok" : "refused";
}

function showToken() {
  $("sp-token-state").replaceChildren(token.get() ? "token kept for this tab"
    : el("span", {}, "no token: storing and marking need one (enter it on ", el("a", { href: "#/alarms", text: "Alarms and events" }), ")"));
}

// One alarm's projection in words, and the levels to draw.
function projectionOf(p, series) {
  const a = p && (p.alarms || []).find((x) => x.name === series);
  if (!a) return { text: "no alarm on this series: no projection", draw: null };
  const where = `${a.source === "history" ? "stored history" : "in-memory trend"}, last ${span(a.window_s)}, ${a.points} points`;
  if (a.no_fit) return { text: `no projection (${where}): ${a.no_fit}`, draw: null };
  const now = secs(p.at) || Date.now() / 1000;
  const parts = [];
  const levels = [];
  for (const l of a.levels || []) {
    const word = l.level === "danger" ? "◆ danger" : "▲ alert";
    if (l.outcome === "crossing") {
      const iv = `between ${span(l.earliest_seconds)} and ${l.latest_seconds == null ? "never (the slow end does not reach it)" : span(l.latest_seconds)}`;
      parts.push(`${word} ${num(l.limit)}: reached in about ${span(l.seconds_to_limit)} (${iv})`);
      levels.push({
        level: l.level, limit: l.limit, cross: now + l.seconds_to_limit,
        early: l.earliest_seconds == null ? null : now + l.earliest_seconds,
        late: l.latest_seconds == null ? null : now + l.latest_seconds,
      });
    } else if (l.outcome === "beyond") parts.push(`${word} ${num(l.limit)}: the fitted line is past it now`);
    else if (l.outcome === "away") parts.push(`${word} ${num(l.limit)}: the trend moves away from it`);
    else parts.push(`${word} ${num(l.limit)}: no significant trend`);
  }
  const sig = a.test ? ` · Mann–Kendall p = ${num(a.test.p, 2)}` : "";
  const slope = a.slope && a.slope.doubling_seconds ? ` · doubles every ${span(a.slope.doubling_seconds)}` : "";
  return {
    text: `projection (${p.growth} growth, ${where}${sig}${slope}): ${parts.join("; ")}`,
    draw: levels.length && a.slope ? { at: now, slope: a.slope.per_second, exponential: p.growth === "exponential", levels } : null,
  };
}

async function loadTrend(me) {
  const name = me.name, series = $("hist-series").value, from = $("hist-range").value;
  const [t, p] = await Promise.all([
    api.historyTrend(name, { series, from, points: 800 }),
    api.projection(name).catch((e) => e),
  ]);
  if (current !== me) return;
  const a = me.detail && (me.detail.alarms || []).find((x) => x.band === series);
  const proj = p instanceof Error ? { text: `no projection: ${p.message}`, draw: null } : projectionOf(p, series);
  trendPlot.setData({
    from: secs(t.from), to: secs(t.to), t: t.t, span_s: t.span_s, n: t.n,
    min: t.min, mean: t.mean, max: t.max, unit: t.unit,
    alert: a ? a.alert_limit : null, danger: a ? a.danger_limit : null,
    holes: (t.holes || []).map((h) => ({ from: secs(h.from), to: secs(h.to), reason: h.reason, lost: h.lost })),
    projection: proj.draw,
  });
  $("hist-trend").dataset.points = String(trendPlot.drawn);
  const lost = (t.holes || []).reduce((s, h) => s + h.lost, 0);
  $("hist-trend-facts").textContent = `${t.series} (${t.unit}) · ${t.t.length} points from ${t.stored_rows} stored rows`
    + `${t.stored_rows > t.t.length ? " (runs merged: min of minima, max of maxima, mean weighted)" : ""}`
    + ` · ${lost ? `${lost} records lost in the range (hatched, with the reason)` : "no records lost in the range"}`
    + `${trendPlot.clipped ? " · the time axis starts shortly before the first stored point" : ""}`;
  $("hist-projection").textContent = proj.text;
  $("hist-trend-downloads").replaceChildren(download(api.historyTrendUrl(name, { series, from, format: "csv" }), "trend CSV"));
}

function waterfallParams() {
  const p = { from: $("hist-range").value, spectrum: $("wf-kind").value === "envelope" ? "envelope" : undefined };
  const lo = $("wf-fmin").value, hi = $("wf-fmax").value;
  if (lo !== "") p.fmin = lo;
  if (hi !== "") p.fmax = hi;
  return p;
}

async function loadWaterfall(me) {
  const params = waterfallParams();
  const cols = Math.max(64, Math.min(1024, Math.round($("hist-waterfall").clientWidth || 512)));
  let d;
  try {
    d = await api.waterfall(me.name, { ...params, columns: cols });
  } catch (e) {
    if (current !== me) return;
    wf.setData(e.status === 404 ? { values: [], f_lo_hz: [], t: [] } : null);
    $("wf-facts").replaceChildren(e.status === 404 ? "no stored spectrum in this range yet" : badge("fault", e.message));
    return;
  }
  if (current !== me) return;
  wf.setData(d);
  $("hist-waterfall").dataset.rows = String(d.values.length);
  const cols0 = d.f_lo_hz.length;
  $("wf-facts").textContent = `${d.values.length} of ${d.in_range} stored ${d.spectrum} spectra`
    + `${d.other_analysis ? ` (${d.other_analysis} made with another analysis left out)` : ""}`
    + ` · ${cols0 ? `${num(d.f_lo_hz[0], 5)}–${num(d.f_hi_hz[cols0 - 1], 5)} Hz in ${cols0} columns` : "no line in the range"}`
    + ` (each the largest of its lines) · ${d.scaling} ${d.unit}, colour in dB re 1 ${d.unit}`;
  $("wf-downloads").replaceChildren(download(api.waterfallUrl(me.name, { ...params, format: "csv" }), "waterfall CSV"));
}

async function loadList(me) {
  const l = await api.storedSpectra(me.name, { from: $("hist-range").value, limit: 100 });
  if (current !== me) return;
  const rows = l.spectra.map((s) => {
    const show = el("button", { type: "button", "data-id": String(s.id), "aria-label": `Show the spectrum stored ${s.time || ""}`, text: "show" });
    show.addEventListener("click", () => showStored(me, s.id));
    const tr = el("tr", {},
      el("td", { class: "num", text: s.time ? new Date(s.time).toLocaleString([], { hour12: false }) : "–" }),
      el("td", { text: s.reason }),
      el("td", { text: s.event || "–" }),
      el("td", { text: s.reference ? "★ reference" : "" }),
      el("td", { class: "num", text: `${s.averages} · ${s.lines}` }),
      el("td", {}, show));
    if (s.id === me.shownId) tr.setAttribute("aria-current", "true");
    return tr;
  });
  if (!rows.length) rows.push(el("tr", {}, el("td", { colspan: "6", class: "muted", text: "no spectrum stored in this range yet" })));
  $("sp-table").querySelector("tbody").replaceChildren(...rows);
  me.listed = l.spectra.length;
}

async function showStored(me, id) {
  me.shownId = id;
  $("sp-reference").disabled = false;
  for (const tr of $("sp-table").querySelectorAll("tbody tr")) {
    const b = tr.querySelector("button");
    if (b && b.dataset.id === String(id)) tr.setAttribute("aria-current", "true"); else tr.removeAttribute("aria-current");
  }
  await drawSpectrum(me);
}

// The plotted spectrum: the shown stored one, or (comparing the live
// one) the live spectrum; the reference dashed over it when comparing.
async function drawSpectrum(me) {
  const mode = $("cmp-of").value;
  if (me.shownId == null && mode !== "live") return;
  try {
    const s = mode === "live" ? await api.spectrum(me.name) : await api.storedSpectrum(me.shownId);
    if (current !== me) return;
    let cmp = null, ref = null;
    if (mode) {
      try {
        cmp = await api.compare(me.name, { of: mode === "live" ? "live" : String(me.shownId) });
        ref = await api.storedSpectrum(cmp.reference.id);
      } catch (e) {
        $("cmp-facts").replaceChildren(badge("fault", e.status === 404 ? "no reference marked for this channel yet" : e.message));
      }
    }
    if (current !== me) return;
    spPlot.speedHz = s.speed_hz;
    spPlot.overlay = ref ? { values: ref.values, label: `reference #${ref.stored.id} (${new Date(ref.stored.time).toLocaleString([], { hour12: false })})` } : null;
    spPlot.setData({ f0: s.f0_hz, df: s.df_hz, values: s.values, unit: s.unit });
    const what = s.stored ? `stored #${s.stored.id} at ${new Date(s.stored.time).toLocaleString([], { hour12: false })} (${s.stored.reason}${s.stored.event ? `: ${s.stored.event}` : ""}${s.stored.reference ? ", the reference" : ""})` : "the live spectrum";
    $("sp-facts").textContent = `${what} · ${s.values.length} lines, ${num(s.df_hz)} Hz apart · ${s.window} window · ${s.averages} averages · ${s.scaling} ${s.unit}`;
    $("hist-spectrum").dataset.shown = s.stored ? String(s.stored.id) : "live";
    $("sp-downloads").replaceChildren(s.stored ? download(api.storedSpectrumUrl(s.stored.id, { format: "csv" }), "spectrum CSV") : "");
    $("cmp").hidden = !cmp;
    if (cmp) {
      dbPlot.setData({ f0: cmp.f0_hz, df: cmp.df_hz, values: cmp.db.map((v) => (v == null ? NaN : v)), unit: "dB" });
      const side = (c) => (c.id == null ? "the live spectrum" : `#${c.id}`) + (c.time ? ` (${new Date(c.time).toLocaleString([], { hour12: false })})` : "");
      $("cmp-facts").textContent = `${side(cmp.of)} against the reference ${side(cmp.reference)}${cmp.reference.channel !== me.name ? ` of ${cmp.reference.channel}` : ""}: per line 10·log10 of the power ratio (above 0: louder than the reference; no value where a line is zero)`;
      $("cmp-bands").querySelector("tbody").replaceChildren(...cmp.bands.map((b) => el("tr", {},
        el("th", { scope: "row", text: b.name }),
        el("td", { class: "num", text: `${num(b.value)} ${b.unit}` }),
        el("td", { class: "num", text: `${num(b.reference)} ${b.unit}` }),
        el("td", { class: "num", text: signedDb(b.db) }))));
    }
  } catch (e) {
    $("sp-facts").replaceChildren(badge("fault", e.message));
  }
}

async function act(kind) {
  const me = current;
  if (!me) return;
  const t = token.get();
  if (!t) { say(false, "enter the token on the Alarms and events page first"); return; }
  try {
    if (kind === "store") {
      const r = await api.storeNow(me.name, t);
      say(true, `stored the live spectrum as #${r.id}`);
      // Shown at once: the list holds the range up to now on the source's
      // clock, which a new spectrum may not be in yet.
      await showStored(me, r.id);
    } else {
      await api.markReference(me.shownId, t);
      say(true, `#${me.shownId} is now the reference of its channel`);
      await drawSpectrum(me);
    }
    await loadList(me);
  } catch (e) {
    say(false, e.status === 401 ? "refused: the token was not accepted" : e.message);
  }
}

function bindOnce() {
  trendPlot = new HistoryTrendPlot($("hist-trend"));
  wf = new WaterfallPlot($("hist-waterfall"), $("hist-legend"));
  const readout = (id) => (p) => {
    const d = p.data;
    if (!d || p.cursor == null) return;
    $(id).textContent = `cursor ${(d.f0 + p.cursor * d.df).toFixed(2)} Hz · ${num(d.values[p.cursor], 4)} ${d.unit}`;
  };
  spPlot = new SpectrumPlot($("hist-spectrum"), readout("sp-readout"));
  spPlot.harmonics = 0;
  dbPlot = new SpectrumPlot($("cmp-db"), readout("cmp-readout"), { kind: "waveform", xLabel: "frequency (Hz)" });
  fill($("wf-palette"), Object.entries(PALETTES).map(([k, v]) => [k, v.label]));
  $("wf-palette").addEventListener("change", (e) => { wf.palette = e.target.value; wf.draw(); });
  $("wf-range").addEventListener("change", (e) => { wf.range = Number(e.target.value); wf.draw(); });
  $("wf-apply").addEventListener("click", () => current && loadWaterfall(current));
  for (const id of ["wf-fmin", "wf-fmax"]) $(id).addEventListener("keydown", (e) => { if (e.key === "Enter" && current) loadWaterfall(current); });
  $("wf-kind").addEventListener("change", () => current && loadWaterfall(current));
  $("hist-range").addEventListener("change", () => current && current.refresh());
  $("hist-series").addEventListener("change", () => current && loadTrend(current).catch(() => {}));
  $("sp-amp").addEventListener("change", (e) => { spPlot.log = e.target.value === "log"; spPlot.draw(); });
  $("cmp-of").addEventListener("change", () => current && drawSpectrum(current));
  $("sp-store").addEventListener("click", () => act("store"));
  $("sp-reference").addEventListener("click", () => act("reference"));
  window.addEventListener("resize", () => { trendPlot.draw(); wf.draw(); spPlot.draw(); dbPlot.draw(); });
}

export function start(name, setLink) {
  if (!trendPlot) bindOnce();
  if (!name) {
    // #/history: the first channel's.
    api.getJSON("/api/v1/channels").then((l) => {
      if (location.hash === "#/history" && l.channels.length) location.replace(`#/history/${encodeURIComponent(l.channels[0].name)}`);
    }).catch((e) => setLink(false, `no data: ${e.message}`));
    return { stop() {} };
  }
  $("history-title").textContent = `History of ${name}`;
  $("history-back").href = `#/channel/${encodeURIComponent(name)}`;
  if (!current || current.name !== name) {
    trendPlot.setData(null); wf.setData(null);
    spPlot.data = null; spPlot.overlay = null; spPlot.draw();
    $("cmp").hidden = true; $("sp-reference").disabled = true;
    $("sp-table").querySelector("tbody").replaceChildren();
    $("sp-message").replaceChildren();
    $("hist-series").dataset.sig = "";
  }
  const me = { name, detail: null, shownId: null };
  current = me;
  showToken();
  const task = async () => {
    if (current !== me) return;
    try {
      const [detail, list] = await Promise.all([api.channel(name).catch((e) => e), api.getJSON("/api/v1/channels")]);
      if (!(detail instanceof Error)) {
        me.detail = detail;
        const first = $("hist-series").dataset.sig === "";
        fill($("hist-series"), [...OVERALL, ...(detail.bands || []).map((b) => [b.name, `band ${b.name} (${b.unit} ${b.measure})`])]);
        // A channel opens on its first alarm's series (the one with a projection).
        if (first && detail.alarms && detail.alarms.length) $("hist-series").value = detail.alarms[0].band;
      }
      $("history-channels").replaceChildren(...list.channels.map((c) =>
        el("a", { href: `#/history/${encodeURIComponent(c.name)}`, text: c.name, ...(c.name === name ? { "aria-current": "page" } : {}) })));
      // The list first: with nothing stored in the range the waterfall is
      // not asked for (its answer would be a 404).
      await loadList(me);
      if (me.listed) await Promise.all([loadTrend(me), loadWaterfall(me)]);
      else {
        await loadTrend(me);
        if (current === me) { wf.setData({ values: [], f_lo_hz: [], t: [] }); $("wf-facts").textContent = "no stored spectrum in this range yet"; }
      }
      setLink(true, `history · updated ${new Date().toLocaleTimeString()}`);
    } catch (e) {
      if (current === me) setLink(false, `no history: ${e.message}`);
    }
  };
  me.refresh = task;
  const p = poller(task, PERIOD_MS);
  return { stop() { p.stop(); if (current === me) current = null; } };
}
