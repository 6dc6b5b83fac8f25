// Channel view: the latest averaged spectrum (raw or envelope, in any
// unit and scaling the API offers) with cursor, harmonic cursors at the
// running speed, bands as shaded spans with their alarm limits, the
// highest peak; the newest waveform (raw, one band's signal, or the
// envelope); the band table; the trend of a band over the last minutes;
// CSV and SVG downloads of what is shown. Polls the public API every
// 1.5 s.

import * as api from "./api.js";
import { el, num, badge, healthBadge, poller, download } from "./ui.js";
import { SpectrumPlot } from "./plot.js";
import { TrendPlot } from "./trend.js";

const PERIOD_MS = 1500;
const $ = (id) => document.getElementById(id);

let plot = null;
let wave = null;
let trendPlot = null;
let current = null; // the channel shown

function readouts(p) {
  const d = p.data;
  if (!d) return;
  if (p.cursor != null) {
    const f = d.f0 + p.cursor * d.df;
    const order = p.speedHz > 0 ? ` · order ${(f / p.speedHz).toFixed(3)}` : "";
    $("cursor-readout").textContent = `cursor ${f.toFixed(2)} Hz${order} · ${num(d.values[p.cursor], 4)} ${d.unit}`;
  }
  $("peak-readout").textContent = p.peak
    ? `highest peak ${p.peak.hz.toFixed(1)} Hz${p.speedHz > 0 ? ` (order ${(p.peak.hz / p.speedHz).toFixed(2)})` : ""} · ${num(p.peak.value, 4)} ${d.unit}`
    : "";
  $("peak-readout").dataset.hz = p.peak ? p.peak.hz.toFixed(3) : "";
  $("harmonic-readout").textContent = p.harmonicHz.length
    ? `harmonic cursors every ${num(p.speedHz, 5)} Hz: ${p.harmonicHz.map((f) => num(f, 5)).join(", ")}`
    : "harmonic cursors: off or no running speed";
  $("harmonic-readout").dataset.hz = p.harmonicHz.join(",");
}

function waveReadout(p) {
  const d = p.data;
  if (!d || p.cursor == null) return;
  $("wave-readout").textContent = `cursor ${(d.f0 + p.cursor * d.df).toFixed(5)} s · ${num(d.values[p.cursor], 4)} ${d.unit}`;
}

function bandRows(detail) {
  const alarms = new Map((detail.alarms || []).map((a) => [a.band, a]));
  return (detail.bands || []).map((b) => {
    const a = alarms.get(b.name);
    const span = b.lo_hz == null ? "–" : `${num(b.lo_hz, 4)}–${num(b.hi_hz, 4)} Hz${b.orders ? ` (orders ${b.orders.map((o) => o.map((x) => num(x, 4)).join("–")).join(", ")})` : ""}`;
    let state;
    if (b.status && b.status !== "ok") state = badge("inhibited", b.status);
    else if (a) {
      const notes = [a.latched ? "latched" : "", a.acknowledged ? "acknowledged" : ""].filter(Boolean).join(", ");
      state = badge(a.state, notes);
    } else state = el("span", { class: "muted", text: "no alarm set" });
    return el("tr", {},
      el("th", { scope: "row", text: `${b.name}${b.defect ? ` (${b.defect.toUpperCase()})` : ""}${b.spectrum === "envelope" ? " · envelope" : ""}` }),
      el("td", { text: span }),
      el("td", { class: "num", text: `${num(b.value)} ${b.unit} ${b.measure}` }),
      el("td", { class: "num", text: a ? `${num(a.alert_limit)} / ${num(a.danger_limit)} ${a.unit}` : "–" }),
      el("td", {}, state));
  });
}

// Fills a <select> with options, keeping the chosen value if it is still
// offered.
function fill(select, options) {
  const sig = options.map(([v, t]) => `${v}=${t}`).join("\n");
  if (select.dataset.sig === sig) return;
  const keep = select.value;
  select.dataset.sig = sig;
  select.replaceChildren(...options.map(([v, t]) => el("option", { value: v, text: t })));
  if (options.some(([v]) => v === keep)) select.value = keep;
}

function spectrumParams(detail) {
  const envelope = $("spec-kind").value === "envelope";
  const unit = $("spec-unit").value;
  return {
    spectrum: envelope ? "envelope" : undefined,
    unit: unit && unit !== detail.unit ? unit : undefined,
    scaling: $("spec-scaling").value !== "rms" ? $("spec-scaling").value : undefined,
  };
}

// The controls follow what the channel offers (README "HTTP API").
function controls(detail) {
  fill($("spec-kind"), [["raw", "raw"], ...(detail.envelope_hz ? [["envelope", `envelope (${detail.envelope_hz.map((x) => num(x, 4)).join("–")} Hz band-pass)`]] : [])]);
  const envelope = $("spec-kind").value === "envelope";
  const units = detail.spectrum_units || [detail.unit];
  // The envelope spectrum stays in the channel's own quantity.
  fill($("spec-unit"), (envelope ? [detail.unit] : units).map((u) => [u, u]));
  fill($("spec-scaling"), (detail.spectrum_scalings || ["rms"]).map((s) => [s, s]));
  const waves = [["", "raw signal"]];
  if (detail.envelope_hz) waves.push(["envelope", "envelope signal"]);
  for (const b of detail.bands || []) waves.push([`band:${b.name}`, `band ${b.name}${b.spectrum === "envelope" ? " (envelope)" : ""}`]);
  fill($("wave-kind"), waves);
  const trends = [["overall:rms", "overall RMS"]];
  for (const b of detail.bands || []) trends.push([`band:${b.name}`, `band ${b.name} (${b.unit} ${b.measure})`]);
  fill($("trend-kind"), trends);
}

// Alarm limits drawn over a band's span when the plot shows what the band
// measures: the same spectrum (raw or envelope), unit and measure. A line
// at a band's RMS limit is guidance: the band value sums every line in the
// span, so the band can trip while each line stays under the line.
function limitsFor(detail, s, envelope) {
  const alarms = new Map((detail.alarms || []).map((a) => [a.band, a]));
  const out = [];
  for (const b of detail.bands || []) {
    const a = alarms.get(b.name);
    if (!a || b.lo_hz == null || (b.spectrum === "envelope") !== envelope) continue;
    if (b.unit !== s.unit || b.measure !== s.scaling) continue;
    for (const [state, v] of [["alert", a.alert_limit], ["danger", a.danger_limit]]) {
      if (Number.isFinite(v)) out.push({ lo: b.lo_hz, hi: b.hi_hz, value: v, state, band: b.name });
    }
  }
  return out;
}

function waveParams() {
  const v = $("wave-kind").value;
  if (v === "envelope") return { envelope: "true" };
  if (v.startsWith("band:")) return { band: v.slice(5) };
  return {};
}

function trendSeries(t, kind) {
  if (kind.startsWith("overall:")) {
    const o = t.overall && t.overall[kind.slice(8)];
    return o && { t: t.t, min: o.min, max: o.max, last: o.last, unit: o.unit, alert: o.alert_limit, danger: o.danger_limit };
  }
  const b = (t.bands || []).find((x) => x.name === kind.slice(5));
  return b && { t: t.t, min: b.min, max: b.max, last: b.last, unit: `${b.unit} ${b.measure}`, alert: b.alert_limit, danger: b.danger_limit };
}

function bindOnce() {
  plot = new SpectrumPlot($("spectrum"), readouts);
  wave = new SpectrumPlot($("waveform"), waveReadout, { kind: "waveform" });
  trendPlot = new TrendPlot($("trend"));
  $("amp-scale").addEventListener("change", (e) => { plot.log = e.target.value === "log"; plot.draw(); exports(); });
  $("harmonics").addEventListener("change", (e) => { plot.harmonics = Number(e.target.value); plot.draw(); });
  $("zoom-in").addEventListener("click", () => plot.zoom(0.5, plot.cursorHz()));
  $("zoom-out").addEventListener("click", () => plot.zoom(2, plot.cursorHz()));
  $("zoom-reset").addEventListener("click", () => plot.reset());
  $("wave-reset").addEventListener("click", () => wave.reset());
  for (const id of ["spec-unit", "spec-scaling"]) {
    $(id).addEventListener("change", () => { plot.view = null; current && current.refresh(); });
  }
  // The envelope spectrum opens on its bands (the defect lines sit low, a
  // few hundred Hz at most), not on the whole span up to Nyquist.
  $("spec-kind").addEventListener("change", () => {
    plot.view = null;
    if ($("spec-kind").value === "envelope" && current && current.detail) {
      const his = (current.detail.bands || []).filter((b) => b.spectrum === "envelope" && b.hi_hz != null).map((b) => b.hi_hz);
      if (his.length) plot.pendingView = [0, Math.max(...his) * 1.5];
    }
    current && current.refresh();
  });
  $("wave-kind").addEventListener("change", () => { wave.view = null; current && current.refresh(); });
  $("trend-kind").addEventListener("change", () => current && current.refresh());
  window.addEventListener("resize", () => { plot.draw(); wave.draw(); trendPlot.draw(); });
}

// The download links for what is shown now.
function exports() {
  if (!current || !current.detail) return;
  const name = current.name, sp = spectrumParams(current.detail), wp = waveParams();
  $("spectrum-downloads").replaceChildren(
    download(api.spectrumUrl(name, { ...sp, format: "csv" }), "spectrum CSV"),
    download(api.spectrumUrl(name, { ...sp, format: "svg", amp: plot.log ? "log" : undefined }), "spectrum SVG"));
  $("waveform-downloads").replaceChildren(
    download(api.waveformUrl(name, { ...wp, format: "csv" }), "waveform CSV"),
    download(api.waveformUrl(name, { ...wp, format: "svg" }), "waveform SVG"));
}

export function start(name, setLink) {
  $("channel-title").textContent = `Channel ${name}`;
  $("channel-history").href = `#/history/${encodeURIComponent(name)}`;
  if (!plot) bindOnce();
  if (!current || current.name !== name) {
    for (const p of [plot, wave]) { p.data = null; p.view = null; p.cursor = null; p.limits = []; p.markers = []; p.draw(); }
    trendPlot.setData(null);
    for (const id of ["spec-kind", "spec-unit", "spec-scaling", "wave-kind", "trend-kind"]) $(id).dataset.sig = "";
  }
  const me = { name, detail: null };
  current = me;
  const task = async () => {
    if (current !== me || $("hold").checked) return;
    try {
      const detail = await api.channel(name);
      me.detail = detail;
      controls(detail);
      const envelope = $("spec-kind").value === "envelope";
      const [s, w, t] = await Promise.all([
        api.spectrum(name, spectrumParams(detail)),
        api.waveform(name, waveParams()).catch((e) => e),
        api.trend(name).catch((e) => e),
      ]);
      if (current !== me) return;
      const alarms = new Map((detail.alarms || []).map((a) => [a.band, a.state]));
      plot.bands = (detail.bands || []).filter((b) => (b.spectrum === "envelope") === envelope)
        .map((b) => ({ name: b.name, lo: b.lo_hz, hi: b.hi_hz, state: alarms.get(b.name) }));
      plot.limits = limitsFor(detail, s, envelope);
      plot.speedHz = s.speed_hz;
      if (plot.pendingView) {
        const top = s.f0_hz + s.df_hz * (s.values.length - 1);
        plot.view = plot.pendingView[1] < top ? plot.pendingView : null;
        plot.pendingView = null;
      }
      plot.setData({ f0: s.f0_hz, df: s.df_hz, values: s.values, unit: s.unit });
      const age = detail.spectrum_age_seconds;
      $("channel-facts").replaceChildren(
        healthBadge(detail), " ",
        detail.alarm_state ? badge(detail.alarm_state) : badge("none"),
        ` · ${envelope ? "envelope spectrum" : "spectrum"}: ${s.values.length} lines, ${num(s.resolution_hz)} Hz resolution (lines ${num(s.df_hz)} Hz apart) · ${s.window} window · ${s.averaging === "none" ? "no averaging" : `${s.averages} ${s.averaging} averages`} · `,
        `${s.scaling} ${s.unit} · speed ${s.speed_hz ? `${num(s.speed_hz * 60, 5)} rpm` : "unknown"} · taken ${new Date(s.timestamp).toLocaleTimeString()}`,
        age == null ? "" : ` (${age.toFixed(1)} s ago)`);
      $("bands").querySelector("tbody").replaceChildren(...bandRows(detail));
      if (w instanceof Error) {
        $("wave-facts").replaceChildren(badge("fault", w.message));
      } else {
        wave.setData({ f0: 0, df: 1 / w.sample_rate_hz, values: w.values, unit: w.unit });
        const what = w.band ? `band ${w.band} signal${w.filter ? ` (${w.filter})` : ""}` : w.envelope ? "envelope signal" : "raw signal";
        $("wave-facts").textContent = `${what} · newest block: ${w.values.length} samples at ${num(w.sample_rate_hz, 6)} Hz (${(w.values.length / w.sample_rate_hz).toFixed(3)} s) · ${w.unit}`;
      }
      if (t instanceof Error) {
        $("trend-facts").replaceChildren(badge("fault", t.message));
      } else {
        trendPlot.setData(trendSeries(t, $("trend-kind").value));
        $("trend-facts").textContent = `one point per ${t.interval_s} s, the last ${Math.round(t.capacity_seconds / 60)} min kept in memory (the band: min..max of each second; the line: its last value)`;
      }
      exports();
      setLink(true, `live · updated ${new Date().toLocaleTimeString()}`);
    } catch (e) {
      setLink(false, `no data: ${e.message}`);
    }
  };
  me.refresh = task;
  const p = poller(task, PERIOD_MS);
  return { stop() { p.stop(); if (current === me) current = null; } };
}
