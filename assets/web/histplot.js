// Canvas plots of the stored history, written for this page:
//
// - HistoryTrendPlot: one series over a time range, each stored point as
//   its min..max envelope with the mean as a line; the alarm's alert and
//   danger limits; the projection (the fitted line from now to where it
//   reaches a limit, the crossing's interval as a bar on the limit);
//   holes (records lost, with their reason) and times without any stored
//   point are hatched and named.
// - WaterfallPlot: stored spectra as a colour map, frequency across, time
//   down (newest at the top), amplitude in dB by colour, with its scale.

import { niceTicks } from "./plot.js";
import { css, fmt, drawLimits } from "./trend.js";

const PAD = { l: 76, r: 16, t: 14, b: 36 };


// Sizes the canvas to its CSS box (sharp on high-density screens).
function prepare(c) {
  const g = c.getContext("2d");
  const dpr = window.devicePixelRatio || 1;
  const w = c.clientWidth || c.width, h = c.clientHeight || c.height;
  if (c.width !== Math.round(w * dpr) || c.height !== Math.round(h * dpr)) {
    c.width = Math.round(w * dpr);
    c.height = Math.round(h * dpr);
  }
  g.setTransform(dpr, 0, 0, dpr, 0, 0);
  g.clearRect(0, 0, w, h);
  g.font = "13px system-ui, sans-serif";
  return { g, w, h };
}

// Time ticks for any span from a minute to a year: a step of whole
// minutes, hours or days, at most `count` of them.
const STEPS = [1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 10800, 21600, 43200,
  86400, 172800, 604800, 1209600, 2592000, 7776000];
export function timeTicks(t0, t1, count) {
  const span = t1 - t0;
  const step = STEPS.find((s) => span / s <= count) || STEPS[STEPS.length - 1];
  // Day steps start at local midnight, shorter steps on the round minute.
  const offset = step >= 86400 ? new Date(t0 * 1000).getTimezoneOffset() * 60 : 0;
  const out = [];
  for (let t = Math.ceil((t0 + offset) / step) * step - offset; t <= t1; t += step) out.push(t);
  return { step, ticks: out };
}

export function timeLabel(t, step) {
  const d = new Date(t * 1000);
  if (step >= 86400) return d.toLocaleDateString([], { month: "short", day: "numeric" });
  const hm = d.toLocaleTimeString([], { hour12: false, hour: "2-digit", minute: "2-digit", second: step < 60 ? "2-digit" : undefined });
  if (step >= 3600 && d.getHours() === 0 && d.getMinutes() === 0) return d.toLocaleDateString([], { month: "short", day: "numeric" });
  return hm;
}

// Diagonal hatching over [x0, x1] of the plot box.
function hatch(g, box, x0, x1, colour) {
  g.save();
  g.beginPath(); g.rect(x0, box.y, Math.max(2, x1 - x0), box.h); g.clip();
  g.fillStyle = css("--hole-wash");
  g.fillRect(x0, box.y, Math.max(2, x1 - x0), box.h);
  g.strokeStyle = colour; g.lineWidth = 1;
  g.beginPath();
  for (let x = x0 - box.h; x < x1; x += 8) { g.moveTo(x, box.y + box.h); g.lineTo(x + box.h, box.y); }
  g.stroke();
  g.restore();
}

export class HistoryTrendPlot {
  constructor(canvas) {
    this.canvas = canvas;
    // { from, to (unix s), t, span_s, n, min, mean, max, unit, alert, danger,
    //   holes: [{from, to, reason, lost}] (unix s), projection: null or
    //   { at, slope, exponential, levels: [{level, limit, outcome, cross, early, late}] } }
    this.data = null;
    this.drawn = 0; // points drawn (read by the browser test)
  }

  setData(d) { this.data = d; this.draw(); }

  draw() {
    const { g, w, h } = prepare(this.canvas);
    const box = { x: PAD.l, y: PAD.t, w: w - PAD.l - PAD.r, h: h - PAD.t - PAD.b };
    g.fillStyle = css("--plot-bg");
    g.fillRect(box.x, box.y, box.w, box.h);
    const s = this.data, ink = css("--ink");
    this.drawn = 0;
    g.fillStyle = ink;
    if (!s) { g.fillText("loading…", box.x + 8, box.y + 20); return; }
    // The time axis: the range asked for, stretched to the right to show
    // a limit crossing no further off than the range itself.
    // A range mostly before the first stored point starts at that point
    // (a new install, a range of a year): the points stay readable.
    let t0 = s.from;
    if (s.t.length && s.t[0] - s.from > 0.25 * (s.to - s.from)) t0 = Math.max(s.from, s.t[0] - 0.05 * (s.to - s.t[0]));
    this.clipped = t0 > s.from;
    let t1 = Math.max(s.to, t0 + 1);
    const crossings = [];
    if (s.projection) {
      for (const l of s.projection.levels) if (l.cross != null) crossings.push(l.cross);
      const far = Math.max(...crossings.filter((c) => c <= s.to + (s.to - s.from)), -Infinity);
      if (far > t1) t1 = far + (far - t0) * 0.03;
    }
    let top = -Infinity, bottom = Infinity;
    for (let i = 0; i < s.t.length; i++) {
      if (s.max[i] != null && s.max[i] > top) top = s.max[i];
      if (s.min[i] != null && s.min[i] < bottom) bottom = s.min[i];
    }
    if (!Number.isFinite(top)) { top = 1; bottom = 0; }
    for (const l of [s.alert, s.danger]) if (l != null && l > top && l < 3 * top) top = l;
    // A limit the projection reaches within the time axis is always on the
    // scale, so the dash-dotted line is seen to meet it.
    if (s.projection) {
      for (const l of s.projection.levels) {
        if (l.cross == null || l.cross > t1 || !Number.isFinite(l.limit)) continue;
        if (l.limit > top) top = l.limit;
        if (l.limit < bottom) bottom = l.limit;
      }
    }
    for (const l of [s.alert, s.danger]) if (l != null && l < bottom && l > bottom / 3) bottom = l;
    const pad = (top - bottom) * 0.08 || Math.abs(top) * 0.1 || 1;
    top += pad; bottom = Math.max(bottom - pad, Math.min(0, bottom));
    const xOf = (t) => box.x + ((t - t0) / (t1 - t0)) * box.w;
    const yOf = (v) => box.y + box.h - ((v - bottom) / (top - bottom)) * box.h;

    g.strokeStyle = css("--rule"); g.lineWidth = 1;
    for (const v of niceTicks(bottom, top, 5)) {
      const y = Math.round(yOf(v)) + 0.5;
      g.beginPath(); g.moveTo(box.x, y); g.lineTo(box.x + box.w, y); g.stroke();
    }
    const { step, ticks } = timeTicks(t0, t1, 7);
    for (const t of ticks) {
      const x = Math.round(xOf(t)) + 0.5;
      g.beginPath(); g.moveTo(x, box.y); g.lineTo(x, box.y + box.h); g.stroke();
    }

    g.save();
    g.beginPath(); g.rect(box.x, box.y, box.w, box.h); g.clip();
    // Where nothing was stored: a gap longer than two intervals between
    // points (the channel was not running), hatched in grey; records lost
    // (holes), hatched darker and named with their reason.
    const typical = s.span_s.length ? Math.min(...s.span_s) : 60;
    const gaps = [];
    let prevEnd = null;
    for (let i = 0; i < s.t.length; i++) {
      if (prevEnd != null && s.t[i] - prevEnd > 2 * typical) gaps.push([prevEnd, s.t[i]]);
      prevEnd = s.t[i] + s.span_s[i];
    }
    for (const [a, b] of gaps) hatch(g, box, xOf(a), xOf(b), css("--rule"));
    let labelRow = 0;
    for (const hl of s.holes) {
      const a = Math.max(t0, hl.from), b = Math.min(t1, hl.to);
      if (b < t0 || a > t1) continue;
      hatch(g, box, xOf(a), xOf(b), css("--muted"));
      g.fillStyle = ink;
      g.fillText(`✕ lost ${hl.lost}: ${hl.reason.replace(/_/g, " ")}`, xOf(a) + 3, box.y + box.h - 6 - 16 * (labelRow++ % 3));
    }

    // Each point: its min..max as a band, broken where points are apart.
    const seg = (i) => i > 0 && s.t[i] - (s.t[i - 1] + s.span_s[i - 1]) <= 2 * typical;
    g.fillStyle = css("--band-wash-strong");
    for (let i = 0; i < s.t.length; i++) {
      if (s.min[i] == null || s.max[i] == null) continue;
      const x0 = xOf(s.t[i]), x1 = Math.max(x0 + 1.5, xOf(s.t[i] + s.span_s[i]));
      const y0 = yOf(s.max[i]), y1 = yOf(s.min[i]);
      g.fillRect(x0, y0, x1 - x0, Math.max(1, y1 - y0));
    }
    // The mean through the middle of each point.
    g.strokeStyle = css("--trace"); g.lineWidth = 1.5;
    g.beginPath();
    let pen = false;
    for (let i = 0; i < s.t.length; i++) {
      const v = s.mean[i];
      if (v == null || !seg(i)) pen = false;
      if (v == null) continue;
      const x = xOf(s.t[i] + s.span_s[i] / 2), y = yOf(v);
      if (pen) g.lineTo(x, y); else { g.moveTo(x, y); g.fillRect(x - 1, y - 1, 2, 2); }
      pen = true;
      this.drawn++;
    }
    g.stroke();

    // The projection: from now along the fitted slope to each crossing.
    const p = s.projection;
    if (p) {
      const now = p.at;
      const valueAt = (l, t) => (p.exponential ? l.limit * Math.exp(p.slope * (t - l.cross)) : l.limit + p.slope * (t - l.cross));
      const x = Math.round(xOf(now)) + 0.5;
      g.strokeStyle = css("--muted"); g.setLineDash([2, 4]);
      g.beginPath(); g.moveTo(x, box.y); g.lineTo(x, box.y + box.h); g.stroke();
      g.setLineDash([]);
      g.fillStyle = ink; g.fillText("now", x + 3, box.y + 12);
      for (const l of p.levels) {
        if (l.cross == null) continue;
        const yL = yOf(l.limit);
        g.strokeStyle = css("--trace"); g.lineWidth = 2; g.setLineDash([10, 4, 2, 4]);
        g.beginPath();
        const steps = 40;
        for (let k = 0; k <= steps; k++) {
          const t = now + ((l.cross - now) * k) / steps;
          const y = yOf(valueAt(l, t));
          if (k === 0) g.moveTo(xOf(t), y); else g.lineTo(xOf(t), y);
        }
        g.stroke(); g.setLineDash([]); g.lineWidth = 1;
        // The interval of the crossing time: a bar on the limit.
        const e = l.early != null ? l.early : l.cross, late = l.late != null ? l.late : t1;
        g.fillStyle = ink;
        g.fillRect(xOf(e), yL - 2, Math.max(2, xOf(late) - xOf(e)), 4);
        g.fillRect(xOf(e), yL - 6, 1.5, 12);
        if (l.late != null) g.fillRect(xOf(late) - 1.5, yL - 6, 1.5, 12);
        g.beginPath(); g.arc(xOf(l.cross), yL, 4, 0, 2 * Math.PI); g.fill();
      }
    }
    g.restore();

    drawLimits(g, box, s, top, bottom, yOf, ink);

    g.fillStyle = ink; g.strokeStyle = ink;
    g.strokeRect(box.x + 0.5, box.y + 0.5, box.w, box.h);
    if (s.t.length === 0) g.fillText("nothing stored in this range yet", box.x + 8, box.y + 40);
    g.textAlign = "center";
    for (const t of ticks) g.fillText(timeLabel(t, step), xOf(t), box.y + box.h + 16);
    g.fillText("time (this PC's clock)", box.x + box.w / 2, box.y + box.h + 32);
    g.textAlign = "right";
    for (const v of niceTicks(bottom, top, 5)) g.fillText(fmt(v), box.x - 6, yOf(v) + 4);
    g.save(); g.translate(14, box.y + box.h / 2); g.rotate(-Math.PI / 2); g.textAlign = "center";
    g.fillText(s.unit || "", 0, 0); g.restore();
    g.textAlign = "left";
  }
}

// Colour maps for the waterfall: stops from the lowest level (first) to
// the highest (last), linear in sRGB between stops. Both are our own and
// both run dark to light, so that lightness alone orders the levels.
//
// - "slate": slate blue-grey through teal and sage to a pale sand, for a
//   quiet plot on the page's greys.
// - "blue-yellow" (colour-blind-safe): its hues stay on the blue–yellow
//   axis, which red–green deficient vision (protan, deutan) keeps, and
//   its CIE L* rises at every stop (about 10, 30, 47, 63, 76, 94), so it
//   also reads in grey. The browser test checks that L* (CIE 1976, from
//   sRGB by IEC 61966-2-1) rises along the whole ramp for both maps.
export const PALETTES = {
  slate: { label: "slate (default)", stops: ["#161c26", "#27455a", "#3b7473", "#7fa07a", "#c9c28f", "#f7f1de"] },
  "blue-yellow": { label: "blue–yellow (colour-blind-safe)", stops: ["#0e1a3c", "#2a4380", "#5a6ea8", "#8f99a8", "#c9bd7e", "#fbf0a8"] },
};

function rgb(hex) {
  const n = parseInt(hex.slice(1), 16);
  return [(n >> 16) & 255, (n >> 8) & 255, n & 255];
}

// The colour of x in [0, 1] on a palette.
export function colourAt(stops, x) {
  const c = stops.map(rgb);
  const u = Math.max(0, Math.min(1, x)) * (c.length - 1);
  const i = Math.min(c.length - 2, Math.floor(u)), f = u - i;
  return c[i].map((v, k) => Math.round(v + (c[i + 1][k] - v) * f));
}

export class WaterfallPlot {
  constructor(canvas, legend) {
    this.canvas = canvas;
    this.legend = legend;
    this.palette = "slate";
    this.range = 60; // dB shown below the highest value
    // The /waterfall JSON.
    this.data = null;
  }

  setData(d) { this.data = d; this.draw(); }

  draw() {
    const { g, w, h } = prepare(this.canvas);
    const box = { x: PAD.l, y: PAD.t, w: w - PAD.l - PAD.r, h: h - PAD.t - PAD.b };
    const ink = css("--ink");
    g.fillStyle = css("--plot-bg");
    g.fillRect(box.x, box.y, box.w, box.h);
    const d = this.data;
    const stops = PALETTES[this.palette].stops;
    g.fillStyle = ink;
    if (!d || !d.values.length || !d.f_lo_hz.length) {
      g.fillText(d ? "no stored spectrum in this range" : "loading…", box.x + 8, box.y + 20);
      this.drawLegend(null, null);
      return;
    }
    const rows = d.values.length, cols = d.f_lo_hz.length;
    let hi = -Infinity;
    for (const r of d.values) for (const v of r) if (v > 0 && Number.isFinite(v)) hi = Math.max(hi, 20 * Math.log10(v));
    if (!Number.isFinite(hi)) hi = 0;
    hi = Math.ceil(hi / 5) * 5;
    const lo = hi - this.range;
    // One pixel per cell in an off-screen image, scaled up without
    // smoothing: each cell stays a sharp block of its own colour.
    const img = new ImageData(cols, rows);
    for (let r = 0; r < rows; r++) {
      const row = d.values[rows - 1 - r]; // newest at the top
      for (let c = 0; c < cols; c++) {
        const v = row[c];
        const db = v > 0 ? 20 * Math.log10(v) : -Infinity;
        const [R, G, B] = colourAt(stops, (db - lo) / (hi - lo));
        const o = (r * cols + c) * 4;
        img.data[o] = R; img.data[o + 1] = G; img.data[o + 2] = B; img.data[o + 3] = 255;
      }
    }
    const off = document.createElement("canvas");
    off.width = cols; off.height = rows;
    off.getContext("2d").putImageData(img, 0, 0);
    g.imageSmoothingEnabled = false;
    g.drawImage(off, box.x, box.y, box.w, box.h);

    // Frequency across (columns are equal runs of lines), time down.
    const fa = d.f_lo_hz[0], fb = d.f_hi_hz[cols - 1];
    const xOf = (f) => box.x + ((f - fa) / Math.max(fb - fa, 1e-9)) * box.w;
    const times = d.t.map((t) => (t ? Date.parse(t) / 1000 : null));
    g.fillStyle = ink; g.strokeStyle = ink;
    g.strokeRect(box.x + 0.5, box.y + 0.5, box.w, box.h);
    g.textAlign = "center";
    for (const f of niceTicks(fa, fb, 8)) {
      g.fillRect(xOf(f), box.y + box.h, 1, 4);
      g.fillText(fmt(f), xOf(f), box.y + box.h + 16);
    }
    g.fillText("frequency (Hz)", box.x + box.w / 2, box.y + box.h + 32);
    g.textAlign = "right";
    const rowH = box.h / rows;
    const every = Math.max(1, Math.ceil(18 / rowH));
    for (let r = 0; r < rows; r += every) {
      const i = rows - 1 - r, t = times[i];
      if (t == null) continue;
      const y = box.y + (r + 0.5) * rowH;
      const span = (times[rows - 1] || 0) - (times[0] || 0);
      const d0 = new Date(t * 1000);
      const text = span > 86400 ? d0.toLocaleString([], { month: "short", day: "numeric", hour: "2-digit", minute: "2-digit", hour12: false })
        : d0.toLocaleTimeString([], { hour12: false });
      g.fillText(text, box.x - 6, y + 4);
    }
    g.textAlign = "left";
    this.drawLegend(lo, hi, d.unit);
    this.shown = { rows, cols, lo, hi };
  }

  // The colour scale: the ramp from the lowest to the highest dB shown.
  drawLegend(lo, hi, unit) {
    if (!this.legend) return;
    const { g, w, h } = prepare(this.legend);
    const stops = PALETTES[this.palette].stops;
    const bar = { x: PAD.l, y: 4, w: Math.min(480, w - PAD.l - 200), h: 16 };
    for (let i = 0; i < bar.w; i++) {
      const [R, G, B] = colourAt(stops, i / (bar.w - 1));
      g.fillStyle = `rgb(${R},${G},${B})`;
      g.fillRect(bar.x + i, bar.y, 1, bar.h);
    }
    const ink = css("--ink");
    g.strokeStyle = ink; g.fillStyle = ink;
    g.strokeRect(bar.x + 0.5, bar.y + 0.5, bar.w, bar.h);
    if (lo == null) return;
    g.textAlign = "center";
    for (const v of niceTicks(lo, hi, 6)) {
      const x = bar.x + ((v - lo) / (hi - lo)) * bar.w;
      g.fillRect(x, bar.y + bar.h, 1, 4);
      g.fillText(fmt(v), x, bar.y + bar.h + 16);
    }
    g.textAlign = "left";
    g.fillText(`dB re 1 ${unit} (${fmt(lo)} dB and below: the darkest colour)`, bar.x + bar.w + 12, bar.y + 13);
    void h;
  }
}
