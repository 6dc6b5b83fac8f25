// Channel view: the latest averaged spectrum with cursor, harmonic
// cursors at the running speed, bands as shaded spans, the highest peak,
// and the band table. Polls the public API every 1.5 s.

import * as api from "./api.js";
import { el, num, badge, healthBadge } from "./ui.js";
import { poller } from "./overview.js";
import { SpectrumPlot } from "./plot.js";

const PERIOD_MS = 1500;
const $ = (id) => document.getElementById(id);

let plot = null;

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

function bandRows(detail) {
  const alarms = new Map((detail.alarms || []).map((a) => [a.band, a]));
  return (detail.bands || []).map((b) => {
    const a = alarms.get(b.name);
    const span = b.lo_hz == null ? "–" : `${num(b.lo_hz, 4)}–${num(b.hi_hz, 4)} Hz${b.orders ? ` (orders ${b.orders.map((o) => o.map((x) => num(x, 4)).join("–")).join(", ")})` : ""}`;
    let state;
    if (b.status && b.status !== "ok") state = badge("inhibited", b.status);
    else if (a) state = badge(a.state, a.acknowledged ? "acknowledged" : a.latched ? "latched" : "");
    else state = el("span", { class: "muted", text: "no alarm set" });
    return el("tr", {},
      el("th", { scope: "row", text: `${b.name}${b.defect ? ` (${b.defect.toUpperCase()})` : ""}${b.spectrum === "envelope" ? " · envelope" : ""}` }),
      el("td", { text: span }),
      el("td", { class: "num", text: `${num(b.value)} ${b.unit} ${b.measure}` }),
      el("td", { class: "num", text: a ? `${num(a.alert_limit)} / ${num(a.danger_limit)} ${a.unit}` : "–" }),
      el("td", {}, state));
  });
}

export function start(name, setLink) {
  $("channel-title").textContent = `Channel ${name}`;
  if (!plot) {
    plot = new SpectrumPlot($("spectrum"), readouts);
    $("amp-scale").addEventListener("change", (e) => { plot.log = e.target.value === "log"; plot.draw(); });
    $("harmonics").addEventListener("change", (e) => { plot.harmonics = Number(e.target.value); plot.draw(); });
    $("zoom-in").addEventListener("click", () => plot.zoom(0.5, plot.cursorHz()));
    $("zoom-out").addEventListener("click", () => plot.zoom(2, plot.cursorHz()));
    $("zoom-reset").addEventListener("click", () => plot.reset());
    window.addEventListener("resize", () => plot.draw());
  }
  plot.data = null; plot.view = null; plot.cursor = null;
  plot.draw();
  return poller(async () => {
    if ($("hold").checked) return;
    try {
      const [detail, s] = await Promise.all([api.channel(name), api.spectrum(name)]);
      const alarms = new Map((detail.alarms || []).map((a) => [a.band, a.state]));
      plot.bands = (detail.bands || []).filter((b) => b.spectrum !== "envelope")
        .map((b) => ({ name: b.name, lo: b.lo_hz, hi: b.hi_hz, state: alarms.get(b.name) }));
      plot.speedHz = s.speed_hz;
      plot.setData({ f0: s.f0_hz, df: s.df_hz, values: s.values, unit: s.unit });
      $("channel-facts").replaceChildren(
        healthBadge(detail), " ",
        detail.alarm_state ? badge(detail.alarm_state) : badge("none"),
        ` · ${s.values.length} lines, ${num(s.resolution_hz)} Hz resolution · ${s.window} window · ${s.averages} ${s.averaging} averages · `,
        `${s.scaling} ${s.unit} · speed ${s.speed_hz ? `${num(s.speed_hz * 60, 5)} rpm` : "unknown"} · taken ${s.timestamp}`);
      $("bands").querySelector("tbody").replaceChildren(...bandRows(detail));
      setLink(true, `live · updated ${new Date().toLocaleTimeString()}`);
    } catch (e) {
      setLink(false, `no data: ${e.message}`);
    }
  }, PERIOD_MS);
}
