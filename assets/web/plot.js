// Spectrum and waveform plots on canvas, written for this page.
//
// One class draws both: x is frequency (Hz) for a spectrum and time (s)
// for a waveform (`kind: "waveform"`: signed values, no log scale, no
// bands or harmonic cursors; a trip marker may be set).
//
// Display decimation: each pixel column draws the min..max of every line
// that falls in it, so no line is skipped and a peak is never lost,
// however many lines the spectrum has. Where lines are wider than a pixel
// the values are joined point to point.

const PAD = { l: 64, r: 16, t: 14, b: 36 };
const DB_FLOOR = -120;

// The colours come from the page's CSS (custom properties), so the plot
// and the tables use the same colour for the same thing.
function css(name) {
  return getComputedStyle(document.documentElement).getPropertyValue(name).trim() || "#000";
}

export function niceTicks(lo, hi, count) {
  const span = hi - lo;
  if (!(span > 0)) return [lo];
  const raw = span / count;
  const p = 10 ** Math.floor(Math.log10(raw));
  const step = [1, 2, 5, 10].map((m) => m * p).find((s) => s >= raw) || raw;
  const out = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) out.push(v);
  return out;
}

// Peak of `values` in lines [i0, i1], refined by Gaussian (log-parabolic)
// interpolation over the three lines around it (common practice for
// Hann-windowed spectra; the formula is from memory:
// p = ½(ln a₋ − ln a₊)/(ln a₋ − 2 ln a₀ + ln a₊)).
export function highestPeak(values, i0, i1) {
  let k = -1;
  for (let i = Math.max(0, i0); i <= Math.min(values.length - 1, i1); i++) {
    if (k < 0 || values[i] > values[k]) k = i;
  }
  if (k < 0) return null;
  let p = 0;
  if (k > 0 && k < values.length - 1 && values[k - 1] > 0 && values[k] > 0 && values[k + 1] > 0) {
    const a = Math.log(values[k - 1]), b = Math.log(values[k]), c = Math.log(values[k + 1]);
    const den = a - 2 * b + c;
    if (den < 0) p = Math.max(-0.5, Math.min(0.5, (0.5 * (a - c)) / den));
  }
  return { line: k, offset: p, value: values[k] };
}

export class SpectrumPlot {
  constructor(canvas, onCursor, opts = {}) {
    this.canvas = canvas;
    this.onCursor = onCursor;
    this.kind = opts.kind || "spectrum";
    this.xLabel = opts.xLabel || null; // the x axis' title, when not the kind's own
    this.data = null; // { f0, df, values, unit }: x of values[i] is f0 + i·df
    this.view = null; // [fmin, fmax] or null for the full span
    this.log = false;
    this.speedHz = null;
    this.harmonics = 10;
    this.bands = []; // { name, lo, hi, state }
    // Alarm limits over a band's span: { lo, hi, value, state: "alert"|"danger", band }
    this.limits = [];
    this.markers = []; // vertical markers: { x, label }
    // A second trace on the same lines (same f0, df), dashed: { values, label }
    this.overlay = null;
    this.cursor = null; // line index
    this.drag = null;
    this.peak = null;
    this.harmonicHz = [];
    this.bindEvents();
  }

  full() {
    const d = this.data;
    return d ? [d.f0, d.f0 + d.df * (d.values.length - 1)] : [0, 1];
  }

  span() { return this.view || this.full(); }

  setData(d) { this.data = d; this.draw(); }

  // Plot size in CSS pixels (the canvas backing store is scaled by the
  // device pixel ratio in draw()).
  size() {
    const c = this.canvas;
    return { w: c.clientWidth || c.width, h: c.clientHeight || c.height };
  }

  plotBox() {
    const { w, h } = this.size();
    return { x: PAD.l, y: PAD.t, w: w - PAD.l - PAD.r, h: h - PAD.t - PAD.b };
  }

  xOf(f) {
    const [a, b] = this.span(), box = this.plotBox();
    return box.x + ((f - a) / (b - a)) * box.w;
  }

  fOf(x) {
    const [a, b] = this.span(), box = this.plotBox();
    return a + ((x - box.x) / box.w) * (b - a);
  }

  get waveform() { return this.kind === "waveform"; }

  amp(v) { return this.log && !this.waveform ? Math.max(DB_FLOOR, 20 * Math.log10(v > 0 ? v : 1e-30)) : v; }

  zoom(factor, centreF) {
    const [a, b] = this.span(), [fa, fb] = this.full();
    const c = centreF ?? (a + b) / 2;
    const min = this.data ? this.data.df * 8 : 1;
    let w = Math.max(min, (b - a) * factor);
    if (w >= fb - fa) { this.view = null; this.draw(); return; }
    let lo = c - (c - a) * (w / (b - a));
    lo = Math.max(fa, Math.min(fb - w, lo));
    this.view = [lo, lo + w];
    this.draw();
  }

  pan(df) {
    if (!this.view) return;
    const [fa, fb] = this.full(), w = this.view[1] - this.view[0];
    const lo = Math.max(fa, Math.min(fb - w, this.view[0] + df));
    this.view = [lo, lo + w];
    this.draw();
  }

  reset() { this.view = null; this.draw(); }

  bindEvents() {
    const c = this.canvas;
    const px = (e) => e.offsetX;
    c.addEventListener("wheel", (e) => {
      e.preventDefault();
      this.zoom(e.deltaY < 0 ? 0.8 : 1.25, this.fOf(px(e)));
    }, { passive: false });
    c.addEventListener("pointerdown", (e) => { this.drag = { x: px(e), span: this.span() }; c.setPointerCapture(e.pointerId); });
    c.addEventListener("pointerup", () => { this.drag = null; });
    c.addEventListener("pointermove", (e) => {
      const x = px(e);
      if (this.drag && this.view) {
        const [a, b] = this.drag.span, box = this.plotBox();
        const shift = ((this.drag.x - x) / box.w) * (b - a);
        const [fa, fb] = this.full(), w = b - a;
        const lo = Math.max(fa, Math.min(fb - w, a + shift));
        this.view = [lo, lo + w];
      }
      if (this.data) this.cursor = this.lineAt(this.fOf(x));
      this.draw();
    });
    c.addEventListener("keydown", (e) => {
      if (!this.data) return;
      const n = this.data.values.length;
      const step = e.shiftKey ? 10 : 1;
      if (e.key === "ArrowRight" || e.key === "ArrowLeft") {
        const base = this.cursor ?? this.lineAt((this.span()[0] + this.span()[1]) / 2);
        this.cursor = Math.max(0, Math.min(n - 1, base + (e.key === "ArrowRight" ? step : -step)));
        const f = this.data.f0 + this.cursor * this.data.df, [a, b] = this.span();
        if (f < a || f > b) this.pan(f < a ? f - a : f - b);
      } else if (e.key === "+" || e.key === "=") this.zoom(0.5, this.cursorHz());
      else if (e.key === "-") this.zoom(2, this.cursorHz());
      else if (e.key === "0" || e.key === "Home") this.reset();
      else return;
      e.preventDefault();
      this.draw();
    });
  }

  lineAt(f) {
    const d = this.data;
    return Math.max(0, Math.min(d.values.length - 1, Math.round((f - d.f0) / d.df)));
  }

  cursorHz() { return this.cursor == null || !this.data ? undefined : this.data.f0 + this.cursor * this.data.df; }

  draw() {
    const c = this.canvas, g = c.getContext("2d");
    const dpr = window.devicePixelRatio || 1, { w, h } = this.size();
    if (c.width !== Math.round(w * dpr) || c.height !== Math.round(h * dpr)) {
      c.width = Math.round(w * dpr);
      c.height = Math.round(h * dpr);
    }
    g.setTransform(dpr, 0, 0, dpr, 0, 0);
    const box = this.plotBox();
    const ink = css("--ink"), faint = css("--rule"), trace = css("--trace");
    g.clearRect(0, 0, w, h);
    g.font = "13px system-ui, sans-serif";
    g.fillStyle = css("--plot-bg");
    g.fillRect(box.x, box.y, box.w, box.h);
    const d = this.data;
    if (!d) return;
    const [fa, fb] = this.span();
    const i0 = Math.max(0, Math.floor((fa - d.f0) / d.df));
    const i1 = Math.min(d.values.length - 1, Math.ceil((fb - d.f0) / d.df));

    // Amplitude range over the visible lines (of both traces).
    let top = -Infinity, bottom = Infinity;
    const ov = this.overlay && this.overlay.values.length === d.values.length ? this.overlay : null;
    for (const vals of ov ? [d.values, ov.values] : [d.values]) {
      for (let i = i0; i <= i1; i++) {
        const v = this.amp(vals[i]);
        if (v > top) top = v;
        if (v < bottom) bottom = v;
      }
    }
    if (this.waveform) {
      const m = Math.max(Math.abs(top), Math.abs(bottom)) * 1.12 || 1;
      top = m; bottom = -m;
    } else if (this.log) {
      bottom = Math.max(bottom, top - 100); top += 6;
    } else {
      bottom = 0; top = top > 0 ? top * 1.12 : 1;
    }
    if (!(top > bottom)) top = bottom + 1;
    const yOf = (v) => box.y + box.h - ((Math.max(bottom, v) - bottom) / (top - bottom)) * box.h;

    // Bands: shaded spans, their state in words at the top.
    g.save();
    g.beginPath(); g.rect(box.x, box.y, box.w, box.h); g.clip();
    for (const b of this.bands) {
      if (b.lo == null || b.hi == null || b.hi < fa || b.lo > fb) continue;
      const x0 = this.xOf(b.lo), x1 = this.xOf(b.hi);
      g.fillStyle = b.state === "danger" ? css("--danger-wash") : b.state === "alert" ? css("--alert-wash") : css("--band-wash");
      g.fillRect(x0, box.y, Math.max(1, x1 - x0), box.h);
      g.fillStyle = ink;
      const label = b.state && b.state !== "normal" ? `${b.name} (${b.state})` : b.name;
      if (x1 - x0 > g.measureText(label).width + 4) g.fillText(label, x0 + 2, box.y + 14);
    }

    // Alarm limits over their band's span: dashed, with the word and the
    // state's shape (▲ alert, ◆ danger) so colour is never the only cue.
    for (const l of this.limits) {
      if (l.hi < fa || l.lo > fb) continue;
      const x0 = Math.max(box.x, this.xOf(l.lo)), x1 = Math.min(box.x + box.w, this.xOf(l.hi));
      const text = `${l.state === "danger" ? "◆ danger" : "▲ alert"} ${fmt(l.value)}`;
      // A limit far above what is drawn does not squash the trace: it is
      // named at the top of its span instead.
      if (this.amp(l.value) > top) {
        g.fillStyle = ink;
        const t = `${text} (above the scale)`;
        if (x1 - x0 > g.measureText(t).width + 4) g.fillText(t, x0 + 2, box.y + box.h - (l.state === "danger" ? 22 : 8));
        continue;
      }
      const y = Math.round(yOf(this.amp(l.value))) + 0.5;
      g.setLineDash(l.state === "danger" ? [8, 3] : [3, 3]);
      g.strokeStyle = css(l.state === "danger" ? "--danger" : "--alert-ink");
      g.lineWidth = 2;
      g.beginPath(); g.moveTo(x0, y); g.lineTo(Math.max(x0 + 2, x1), y); g.stroke();
      g.setLineDash([]); g.lineWidth = 1;
      g.fillStyle = ink;
      if (x1 - x0 > g.measureText(text).width + 4) g.fillText(text, x0 + 2, y - 3);
    }
    for (const m of this.markers) {
      if (m.x < fa || m.x > fb) continue;
      const x = Math.round(this.xOf(m.x)) + 0.5;
      g.strokeStyle = ink; g.setLineDash([6, 3]); g.lineWidth = 1.5;
      g.beginPath(); g.moveTo(x, box.y); g.lineTo(x, box.y + box.h); g.stroke();
      g.setLineDash([]); g.lineWidth = 1;
      g.fillStyle = ink; g.fillText(m.label, x + 4, box.y + 14);
    }

    // Grid and axes.
    g.strokeStyle = faint; g.fillStyle = ink; g.lineWidth = 1;
    for (const f of niceTicks(fa, fb, 8)) {
      const x = Math.round(this.xOf(f)) + 0.5;
      g.beginPath(); g.moveTo(x, box.y); g.lineTo(x, box.y + box.h); g.stroke();
    }
    for (const v of niceTicks(bottom, top, 5)) {
      const y = Math.round(yOf(v)) + 0.5;
      g.beginPath(); g.moveTo(box.x, y); g.lineTo(box.x + box.w, y); g.stroke();
    }

    // Harmonic cursors at multiples of the running speed.
    this.harmonicHz = [];
    if (!this.waveform && this.speedHz > 0 && this.harmonics > 0) {
      g.setLineDash([4, 4]); g.strokeStyle = css("--cursor");
      // Too close together to tell apart: listed in the readout, not drawn.
      const gap = this.xOf(fa + this.speedHz) - this.xOf(fa);
      for (let k = 1; k <= this.harmonics; k++) {
        const f = k * this.speedHz;
        this.harmonicHz.push(f);
        if (f < fa || f > fb || gap < 6) continue;
        const x = Math.round(this.xOf(f)) + 0.5;
        g.beginPath(); g.moveTo(x, box.y + 18); g.lineTo(x, box.y + box.h); g.stroke();
        g.fillStyle = css("--cursor");
        if (gap >= 26) g.fillText(`${k}×`, x + 2, box.y + 30);
      }
      g.setLineDash([]);
    }

    // The overlay first, dashed and lighter, under the trace: the largest
    // line of each pixel column, joined.
    if (ov) {
      g.strokeStyle = css("--muted"); g.lineWidth = 1.5; g.setLineDash([5, 3]);
      g.beginPath();
      let first = true;
      const to = (x, v) => {
        if (!Number.isFinite(v)) return;
        if (first) { g.moveTo(x, yOf(v)); first = false; } else g.lineTo(x, yOf(v));
      };
      if ((i1 - i0 + 1) / box.w <= 1) {
        for (let i = i0; i <= i1; i++) to(this.xOf(d.f0 + i * d.df), this.amp(ov.values[i]));
      } else {
        let i = i0;
        for (let col = 0; col < box.w && i <= i1; col++) {
          const fEnd = this.fOf(box.x + col + 1);
          let hi = -Infinity;
          while (i <= i1 && d.f0 + i * d.df < fEnd) { hi = Math.max(hi, this.amp(ov.values[i])); i++; }
          to(box.x + col + 0.5, hi);
        }
      }
      g.stroke(); g.setLineDash([]);
      g.fillStyle = ink;
      g.fillText(`dashed: ${ov.label}`, box.x + box.w - g.measureText(`dashed: ${ov.label}`).width - 6, box.y + 14);
    }

    // The trace: min..max per pixel column (never skipping a line).
    g.strokeStyle = trace; g.lineWidth = 1.25;
    g.beginPath();
    const perPx = (i1 - i0 + 1) / box.w;
    if (perPx <= 1) {
      for (let i = i0; i <= i1; i++) {
        const x = this.xOf(d.f0 + i * d.df), y = yOf(this.amp(d.values[i]));
        if (i === i0) g.moveTo(x, y); else g.lineTo(x, y);
      }
    } else {
      let i = i0, first = true;
      for (let col = 0; col < box.w && i <= i1; col++) {
        const fEnd = this.fOf(box.x + col + 1);
        let lo = Infinity, hi = -Infinity;
        while (i <= i1 && d.f0 + i * d.df < fEnd) {
          const v = this.amp(d.values[i]);
          if (v < lo) lo = v;
          if (v > hi) hi = v;
          i++;
        }
        if (hi === -Infinity) continue;
        const x = box.x + col + 0.5;
        if (first) { g.moveTo(x, yOf(hi)); first = false; } else g.lineTo(x, yOf(hi));
        g.lineTo(x, yOf(lo));
      }
    }
    g.stroke();

    // Highest peak in view, labelled (spectra only).
    const pk = this.waveform ? null : highestPeak(d.values, i0, i1);
    this.peak = pk && { hz: d.f0 + (pk.line + pk.offset) * d.df, value: pk.value };
    if (this.peak) {
      const x = this.xOf(this.peak.hz), y = yOf(this.amp(pk.value));
      const order = this.speedHz > 0 ? ` · ${(this.peak.hz / this.speedHz).toFixed(2)}×` : "";
      const text = `peak ${this.peak.hz.toFixed(1)} Hz${order} · ${fmt(pk.value)} ${d.unit}`;
      g.fillStyle = ink;
      g.beginPath(); g.moveTo(x, y - 3); g.lineTo(x - 5, y - 11); g.lineTo(x + 5, y - 11); g.closePath(); g.fill();
      const tw = g.measureText(text).width;
      g.fillText(text, Math.min(box.x + box.w - tw - 2, Math.max(box.x + 2, x + 8)), Math.max(box.y + 44, y + 4));
    }

    // Cursor.
    if (this.cursor != null && this.cursor >= i0 && this.cursor <= i1) {
      const f = d.f0 + this.cursor * d.df, x = Math.round(this.xOf(f)) + 0.5;
      g.strokeStyle = ink; g.beginPath(); g.moveTo(x, box.y); g.lineTo(x, box.y + box.h); g.stroke();
    }
    g.restore();

    // Tick labels and frame.
    g.fillStyle = ink; g.strokeStyle = ink;
    g.strokeRect(box.x + 0.5, box.y + 0.5, box.w, box.h);
    g.textAlign = "center";
    for (const f of niceTicks(fa, fb, 8)) g.fillText(fmt(f), this.xOf(f), box.y + box.h + 16);
    g.fillText(this.xLabel || (this.waveform ? "time (s)" : "frequency (Hz)"), box.x + box.w / 2, box.y + box.h + 32);
    g.textAlign = "right";
    for (const v of niceTicks(bottom, top, 5)) g.fillText(fmt(v), box.x - 6, yOf(v) + 4);
    g.save(); g.translate(14, box.y + box.h / 2); g.rotate(-Math.PI / 2); g.textAlign = "center";
    g.fillText(this.log && !this.waveform ? `dB re 1 ${d.unit}` : d.unit, 0, 0); g.restore();
    g.textAlign = "left";

    this.onCursor(this);
  }
}

function fmt(v) {
  const a = Math.abs(v);
  if (a !== 0 && (a >= 1e5 || a < 1e-3)) return v.toExponential(1);
  return Number(v.toPrecision(4)).toString();
}
