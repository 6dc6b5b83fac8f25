// One capture (an alarm trip's record): what tripped, the spectrum at
// the trip and the stored waveform around it, with downloads of the raw
// capture (BWF1), CSV and SVG. Read once: a capture does not change.

import * as api from "./api.js";
import { el, num, badge, download } from "./ui.js";
import { SpectrumPlot } from "./plot.js";

const $ = (id) => document.getElementById(id);
let specPlot = null;
let wavePlot = null;

// The waveform CSV (README "HTTP API"): a header line, then one sample
// per line; the last column is the value.
export function parseCsvValues(text) {
  const out = [];
  for (const line of text.split(/\r?\n/)) {
    if (!line || !/^[-+0-9.]/.test(line)) continue;
    const cols = line.split(",");
    const v = Number(cols[cols.length - 1]);
    if (Number.isFinite(v)) out.push(v);
  }
  return Float32Array.from(out);
}

function cursorText(out, unit, xUnit) {
  return (p) => {
    if (p.cursor == null || !p.data) return;
    const x = p.data.f0 + p.cursor * p.data.df;
    $(out).textContent = `cursor ${x.toFixed(xUnit === "s" ? 4 : 2)} ${xUnit} · ${num(p.data.values[p.cursor], 4)} ${unit}`;
  };
}

export function start(id, setLink) {
  let stopped = false;
  $("capture-title").textContent = `Capture ${id}`;
  $("capture-facts").replaceChildren("loading…");
  $("capture-downloads").replaceChildren(
    download(api.eventWaveformUrl(id), "raw capture (BWF1)"),
    download(api.eventWaveformUrl(id, { format: "csv" }), "waveform CSV"),
    download(api.eventWaveformUrl(id, { format: "svg" }), "waveform SVG"),
    download(api.eventUrl(id, { format: "csv" }), "spectrum CSV"),
    download(api.eventUrl(id, { format: "svg" }), "spectrum SVG"));
  if (!specPlot) {
    specPlot = new SpectrumPlot($("capture-spectrum"), () => {});
    wavePlot = new SpectrumPlot($("capture-waveform"), () => {}, { kind: "waveform" });
  }
  specPlot.data = null; specPlot.view = null; specPlot.cursor = null; specPlot.draw();
  wavePlot.data = null; wavePlot.view = null; wavePlot.cursor = null; wavePlot.draw();
  (async () => {
    try {
      const m = await api.event(id);
      if (stopped) return;
      const t = m.trip;
      specPlot.onCursor = cursorText("capture-spectrum-readout", m.spectrum ? m.spectrum.unit : "", "Hz");
      $("capture-facts").replaceChildren(
        ["alert", "danger"].includes(t.to) ? badge(t.to) : el("span", { text: t.to }),
        ` ${t.channel} / ${t.band}: ${t.from} → ${t.to} at ${new Date(t.time).toLocaleString()}`,
        ` · value ${num(t.value, 4)} ${t.unit} · limits ${num(t.limits.alert)} / ${num(t.limits.danger)} ${t.unit}`,
        ` · ${m.complete ? "complete" : `incomplete (${m.end_reason})`}`);
      $("capture-bands").querySelector("tbody").replaceChildren(...(m.bands || []).map((b) => el("tr", {},
        el("th", { scope: "row", text: b.band }), el("td", { class: "num", text: `${num(b.value, 4)} ${b.unit}` }))));
      if (m.spectrum) {
        const s = m.spectrum;
        // Stored as power per line (the averaged spectrum's own form);
        // drawn as line RMS, √power, as the live view's default.
        const power = s.scaling === "power";
        const values = power ? Float32Array.from(s.values, (v) => Math.sqrt(Math.max(0, v))) : s.values;
        $("capture-spectrum-facts").textContent = `${s.values.length} lines, ${num(s.df_hz)} Hz apart · ${s.window} window · ${s.averages} averages · ${power ? `line RMS in ${s.unit} (stored as power)` : `${s.scaling} ${s.unit}`}`;
        specPlot.setData({ f0: s.f0_hz, df: s.df_hz, values, unit: power ? `${s.unit} rms` : s.unit });
      } else {
        $("capture-spectrum-facts").textContent = "no spectrum was stored with this capture";
      }
      const w = m.waveform;
      const csv = await api.getText(api.eventWaveformUrl(id, { format: "csv" }));
      if (stopped) return;
      const values = parseCsvValues(csv);
      const tripS = w.pre_samples / w.sample_rate_hz;
      wavePlot.onCursor = cursorText("capture-waveform-readout", w.unit, "s");
      wavePlot.markers = [{ x: tripS, label: "trip" }];
      $("capture-waveform-facts").textContent = `${values.length} samples at ${num(w.sample_rate_hz, 6)} Hz (${(values.length / w.sample_rate_hz).toFixed(2)} s), trip at ${tripS.toFixed(2)} s · ${w.unit}`;
      wavePlot.setData({ f0: 0, df: 1 / w.sample_rate_hz, values, unit: w.unit });
      setLink(true, `capture loaded ${new Date().toLocaleTimeString()}`);
    } catch (e) {
      $("capture-facts").replaceChildren(badge("fault", e.message));
      setLink(false, e.message);
    }
  })();
  return { stop() { stopped = true; } };
}
