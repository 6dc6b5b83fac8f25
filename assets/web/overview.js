// Overview: every channel (source, health, worst alarm, overall level,
// bands with limits), the machines with their speed, and the counters of
// lost data. One call per update (GET /api/v1/overview) every 1.5 s.

import * as api from "./api.js";
import { el, num, badge, healthBadge, poller, navLinks } from "./ui.js";

const PERIOD_MS = 1500;

function bandCell(d) {
  const limits = new Map((d.alarms || []).map((a) => [a.band, a]));
  const list = el("ul", { class: "bands" });
  for (const b of d.bands || []) {
    const a = limits.get(b.name);
    const li = el("li", {}, el("span", { class: "band-name", text: b.name }), " ");
    if (b.status && b.status !== "ok") li.append(badge("inhibited", b.status));
    else li.append(`${num(b.value)} ${b.unit}`);
    if (a) {
      li.append(el("span", { class: "limits", text: ` · ${num(a.alert_limit)} / ${num(a.danger_limit)}` }));
      if (a.state !== "normal") li.append(" ", badge(a.state));
    }
    list.append(li);
  }
  return list;
}

function row(d) {
  const src = d.source;
  const srcCell = el("td", {});
  srcCell.append(src.state === "connected" ? el("span", { text: `${src.name} (${src.kind})` })
    : badge("fault", `${src.name} ${src.state}`));
  return el("tr", { "data-channel": d.name },
    el("th", { scope: "row" }, el("a", { href: `#/channel/${encodeURIComponent(d.name)}`, text: d.name })),
    srcCell,
    el("td", {}, healthBadge(d)),
    el("td", {}, d.alarm_state ? badge(d.alarm_state) : badge("none")),
    el("td", { class: "num", text: d.overall ? `${num(d.overall.rms)} ${d.overall.unit}` : "–" }),
    el("td", {}, bandCell(d)),
    el("td", { class: "num", text: d.spectrum_age_seconds == null ? "none yet" : `${d.spectrum_age_seconds.toFixed(1)} s` }),
  );
}

function machines(list) {
  return list.map((m) => el("tr", {},
    el("th", { scope: "row", text: m.name }),
    el("td", { class: "num" }, m.speed_hz == null ? badge("fault", "speed unknown")
      : `${num(m.speed_rpm, 5)} rpm (${num(m.speed_hz, 4)} Hz)`),
    el("td", { text: m.speed_source }),
    el("td", { class: "num", text: String(m.speed_late_results ?? m.late_results ?? "–") }),
  ));
}

function losses(details, sources) {
  const rows = [];
  for (const d of details) {
    const c = d.counters || {};
    for (const [reason, n] of Object.entries(c.samples_dropped || {})) {
      rows.push([d.name, `samples dropped: ${reason}`, n]);
    }
  }
  for (const s of sources) {
    const c = s.counters || {};
    for (const k of ["crc_errors", "missing_samples", "late_frames", "resyncs", "skipped_bytes"]) {
      if (k in c) rows.push([`source ${s.name}`, k.replace(/_/g, " "), c[k]]);
    }
    for (const [reason, n] of Object.entries(c.rejected || {})) rows.push([`source ${s.name}`, `rejected: ${reason}`, n]);
  }
  // Counters above zero one by one (marked); those at zero in one line.
  const lost = rows.filter(([, , n]) => n > 0);
  const zero = rows.length - lost.length;
  const out = lost.map(([w, k, n]) => el("tr", { class: "abnormal" },
    el("td", { text: w }), el("td", { text: k }),
    el("td", { class: "num" }, badge("alert", String(n)))));
  if (zero > 0) {
    out.push(el("tr", {}, el("td", { text: lost.length ? "everywhere else" : "every channel and source" }),
      el("td", { text: `${zero} counters (samples dropped by reason, CRC errors, missing samples, late frames, resyncs, skipped bytes, rejected frames)` }),
      el("td", { class: "num", text: "0" })));
  }
  return out;
}

// Replaces the rows' cells but keeps each row's first cell (the channel
// link) when the channel is the same, so keyboard focus on a link survives
// the updates.
function updateRows(tbody, rows) {
  const old = [...tbody.rows];
  const same = old.length === rows.length
    && old.every((r, i) => r.dataset.channel === rows[i].dataset.channel);
  if (!same) { tbody.replaceChildren(...rows); return; }
  old.forEach((r, i) => {
    const cells = [...rows[i].cells].slice(1);
    [...r.cells].slice(1).forEach((c) => c.remove());
    r.append(...cells);
  });
}

export function start(setLink) {
  return poller(async () => {
    try {
      const o = await api.overview();
      const details = o.channels;
      navLinks(details.map((d) => d.name));
      updateRows(document.querySelector("#channels tbody"), details.map(row));
      document.querySelector("#machines tbody").replaceChildren(...machines(o.machines || []));
      document.querySelector("#losses tbody").replaceChildren(...losses(details, o.sources || []));
      setLink(true, `live · updated ${new Date().toLocaleTimeString()}`);
    } catch (e) {
      setLink(false, `no data: ${e.message}`);
    }
  }, PERIOD_MS);
}
