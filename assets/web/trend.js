// Trend plot on canvas, written for this page: one band (or overall
// level) over the last minutes the daemon keeps in memory. Each point is
// one second: the band drawn as the min..max of the values published in
// that second (so a spike is never lost) and a line through the last
// value; alert and danger limits as dashed lines with their word and
// shape; gaps (no value, or a not-ok status) break the line.

import { niceTicks } from "./plot.js";

const PAD = { l: 76, r: 16, t: 14, b: 36 };

export function css(name) {
  return getComputedStyle(document.documentElement).getPropertyValue(name).trim() || "#000";
}

export function fmt(v) {
  const a = Math.abs(v);
  if (a !== 0 && (a >= 1e5 || a < 1e-3)) return v.toExponential(1);
  return Number(v.toPrecision(4)).toString();
}

// The alert and danger limits of `s` across the plot box: dashed lines
// with their word and shape, or a note when a limit is off the scale.
// Shared by the in-memory trend and the stored history's trend.
export function drawLimits(g, box, s, top, bottom, yOf, ink) {
  for (const [state, v] of [["alert", s.alert], ["danger", s.danger]]) {
    if (v == null) continue;
    const text = `${state === "danger" ? "◆ danger" : "▲ alert"} ${fmt(v)}`;
    if (v > top || v < bottom) {
      g.fillStyle = ink;
      g.fillText(`${text} (${v > top ? "above" : "below"} the scale)`, box.x + 4, box.y + (state === "danger" ? 14 : 28));
      continue;
    }
    const y = Math.round(yOf(v)) + 0.5;
    g.setLineDash(state === "danger" ? [8, 3] : [3, 3]);
    g.strokeStyle = css(state === "danger" ? "--danger" : "--alert-ink");
    g.lineWidth = 2;
    g.beginPath(); g.moveTo(box.x, y); g.lineTo(box.x + box.w, y); g.stroke();
    g.setLineDash([]); g.lineWidth = 1;
    g.fillStyle = ink;
    g.fillText(text, box.x + 4, y - 3);
  }
}

function clock(t) {
  return new Date(t * 1000).toLocaleTimeString([], { hour12: false });
}

export class TrendPlot {
  constructor(canvas) {
    this.canvas = canvas;
    // { t: [unix s], min: [], max: [], last: [], unit, alert, danger, label }
    this.series = null;
  }

  setData(s) { this.series = s; this.draw(); }

  draw() {
    const c = this.canvas, g = c.getContext("2d");
    const dpr = window.devicePixelRatio || 1;
    const w = c.clientWidth || c.width, h = c.clientHeight || c.height;
    if (c.width !== Math.round(w * dpr) || c.height !== Math.round(h * dpr)) {
      c.width = Math.round(w * dpr);
      c.height = Math.round(h * dpr);
    }
    g.setTransform(dpr, 0, 0, dpr, 0, 0);
    g.clearRect(0, 0, w, h);
    g.font = "13px system-ui, sans-serif";
    const box = { x: PAD.l, y: PAD.t, w: w - PAD.l - PAD.r, h: h - PAD.t - PAD.b };
    g.fillStyle = css("--plot-bg");
    g.fillRect(box.x, box.y, box.w, box.h);
    const s = this.series, ink = css("--ink");
    g.fillStyle = ink;
    if (!s || s.t.length === 0) {
      g.fillText("no values kept yet", box.x + 8, box.y + 20);
      return;
    }
    const t0 = s.t[0], t1 = Math.max(s.t[s.t.length - 1], t0 + 1);
    let top = -Infinity, bottom = Infinity;
    for (let i = 0; i < s.t.length; i++) {
      if (s.max[i] != null && s.max[i] > top) top = s.max[i];
      if (s.min[i] != null && s.min[i] < bottom) bottom = s.min[i];
    }
    // Scaled to the values, so that a change shows; a limit within twice
    // the highest value is brought into view, one further off is named.
    if (!Number.isFinite(top)) { top = 1; bottom = 0; }
    for (const l of [s.alert, s.danger]) if (l != null && l > top && l < 2 * top) top = l;
    const pad = (top - bottom) * 0.1 || Math.abs(top) * 0.1 || 1;
    top += pad; bottom -= pad;
    const xOf = (t) => box.x + ((t - t0) / (t1 - t0)) * box.w;
    const yOf = (v) => box.y + box.h - ((v - bottom) / (top - bottom)) * box.h;

    g.strokeStyle = css("--rule"); g.lineWidth = 1;
    for (const v of niceTicks(bottom, top, 5)) {
      const y = Math.round(yOf(v)) + 0.5;
      g.beginPath(); g.moveTo(box.x, y); g.lineTo(box.x + box.w, y); g.stroke();
    }
    const span = t1 - t0;
    const step = [1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 1800, 3600].find((x) => span / x <= 6) || 3600;
    const ticks = [];
    for (let t = Math.ceil(t0 / step) * step; t <= t1; t += step) ticks.push(t);
    for (const t of ticks) {
      const x = Math.round(xOf(t)) + 0.5;
      g.beginPath(); g.moveTo(x, box.y); g.lineTo(x, box.y + box.h); g.stroke();
    }

    // min..max of each second, then the last values as a line.
    g.fillStyle = css("--band-wash-strong");
    for (let i = 0; i < s.t.length; i++) {
      if (s.min[i] == null || s.max[i] == null) continue;
      const x = xOf(s.t[i]), y0 = yOf(s.max[i]), y1 = yOf(s.min[i]);
      g.fillRect(x - 1, y0, 2, Math.max(1, y1 - y0));
    }
    g.strokeStyle = css("--trace"); g.lineWidth = 1.5;
    g.beginPath();
    let pen = false;
    for (let i = 0; i < s.t.length; i++) {
      const v = s.last[i];
      // A missing value, or a hole of more than 3 s, breaks the line.
      if (v == null || (i > 0 && s.t[i] - s.t[i - 1] > 3)) pen = false;
      if (v == null) continue;
      if (pen) g.lineTo(xOf(s.t[i]), yOf(v)); else g.moveTo(xOf(s.t[i]), yOf(v));
      pen = true;
    }
    g.stroke();

    drawLimits(g, box, s, top, bottom, yOf, ink);

    g.fillStyle = ink; g.strokeStyle = ink;
    g.strokeRect(box.x + 0.5, box.y + 0.5, box.w, box.h);
    g.textAlign = "center";
    for (const t of ticks) g.fillText(clock(t), xOf(t), box.y + box.h + 16);
    g.fillText("time (this PC's clock)", box.x + box.w / 2, box.y + box.h + 32);
    g.textAlign = "right";
    for (const v of niceTicks(bottom, top, 5)) g.fillText(fmt(v), box.x - 6, yOf(v) + 4);
    g.save(); g.translate(14, box.y + box.h / 2); g.rotate(-Math.PI / 2); g.textAlign = "center";
    g.fillText(s.unit || "", 0, 0); g.restore();
    g.textAlign = "left";
  }
}
