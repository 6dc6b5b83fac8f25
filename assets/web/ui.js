// Small helpers shared by the views: DOM building, number format, states.
//
// States follow high-performance HMI practice (ISA-101): normal is plain
// grey text; colour only for abnormal states, always the same colour for
// the same state, and always with a word and a shape beside it.

export function el(tag, attrs = {}, ...kids) {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) {
    if (k === "class") e.className = v;
    else if (k === "text") e.textContent = v;
    else e.setAttribute(k, v);
  }
  for (const k of kids) e.append(k);
  return e;
}

export function num(v, digits = 3) {
  if (v === null || v === undefined || !Number.isFinite(v)) return "–";
  const a = Math.abs(v);
  if (a !== 0 && (a >= 1e5 || a < 1e-3)) return v.toExponential(2);
  return String(Number(v.toPrecision(digits)));
}

// state -> [shape, word, css class]
const STATES = {
  normal: ["", "normal", "st-normal"],
  inhibited: ["◻", "inhibited", "st-inhibited"],
  alert: ["▲", "alert", "st-alert"],
  danger: ["◆", "danger", "st-danger"],
  fault: ["✕", "fault", "st-fault"],
  none: ["", "no alarms", "st-none"],
};

export function badge(state, extra) {
  const [shape, word, cls] = STATES[state] || ["?", String(state), "st-fault"];
  const b = el("span", { class: `badge ${cls}` });
  if (shape) b.append(el("span", { class: "shape", "aria-hidden": "true", text: shape }));
  b.append(document.createTextNode(extra ? `${word}: ${extra}` : word));
  return b;
}

export function healthBadge(detail) {
  const h = detail.health;
  if (!h) return badge("none");
  if (h.ok && !detail.stale) return el("span", { class: "badge st-normal", text: "OK" });
  const reasons = [...(h.reasons || [])];
  if (detail.stale) reasons.push("stale");
  return badge("fault", reasons.join(", ") || "not OK");
}

// Runs `task` now and again `period` ms after each run ends (never two at
// once, however slow the answers), until stopped.
export function poller(task, period) {
  let timer = null;
  let stopped = false;
  const tick = async () => {
    await task();
    if (!stopped) timer = setTimeout(tick, period);
  };
  tick();
  return { stop() { stopped = true; clearTimeout(timer); } };
}

// A download link (same origin; the daemon names the file).
export function download(href, text) {
  return el("a", { href, download: "", class: "download", text });
}

// The channel links in the top bar (rebuilt only when the list changes).
export function navLinks(names) {
  const nav = document.getElementById("nav-channels");
  if (nav.dataset.names === names.join("\n")) return;
  nav.dataset.names = names.join("\n");
  nav.replaceChildren(...names.map((n) => el("a", { href: `#/channel/${encodeURIComponent(n)}`, text: n })));
}
