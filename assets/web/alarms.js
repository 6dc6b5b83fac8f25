// Alarms and events: every alarm with its state, value, limits, since,
// latched / acknowledged; acknowledge and re-learn with the bearer token;
// the event list, newest first, with each capture's link. Polls the
// public API every 1.5 s.
//
// The token is typed once and kept only in this tab's session storage
// (gone when the tab closes); it travels only in the Authorization header
// of the two POSTs, never in an address.

import * as api from "./api.js";
import { el, num, badge, poller } from "./ui.js";

const PERIOD_MS = 1500;
const TOKEN_KEY = "bandwatch.token";
const EVENTS_SHOWN = 200;
const $ = (id) => document.getElementById(id);

export const token = {
  get: () => sessionStorage.getItem(TOKEN_KEY) || "",
  set: (t) => sessionStorage.setItem(TOKEN_KEY, t),
  clear: () => sessionStorage.removeItem(TOKEN_KEY),
};

let bound = false;
let refresh = async () => {};

function showToken() {
  const have = token.get() !== "";
  $("token-state").textContent = have ? "token kept for this tab" : "no token: acknowledge and re-learn need one";
  $("token-forget").disabled = !have;
}

function say(ok, text) {
  const m = $("alarm-message");
  m.replaceChildren(ok ? el("span", { text }) : badge("fault", text));
  m.dataset.outcome = ok ? "ok" : "refused";
}

async function act(kind, a) {
  const t = token.get();
  if (!t) {
    say(false, "enter the token first (above)");
    $("token-input").focus();
    return;
  }
  const what = `${kind === "ack" ? "acknowledge" : "re-learn"} ${a.channel} / ${a.band}`;
  try {
    await (kind === "ack" ? api.ack(a.channel, a.band, t) : api.relearn(a.channel, a.band, t));
    say(true, `${what}: done`);
  } catch (e) {
    const why = e.status === 401 ? "refused: the token was not accepted"
      : e.status === 409 ? "refused: nothing to do (not latched, or already acknowledged)"
        : `failed: ${e.message}`;
    say(false, `${what}: ${why}`);
  }
  await refresh();
}

function bindOnce() {
  if (bound) return;
  bound = true;
  $("token-form").addEventListener("submit", (e) => {
    e.preventDefault();
    const v = $("token-input").value.trim();
    $("token-input").value = "";
    if (v) token.set(v);
    showToken();
  });
  $("token-forget").addEventListener("click", () => { token.clear(); showToken(); });
  // One listener for every row's buttons (rows are rebuilt by the updates).
  $("alarm-table").addEventListener("click", (e) => {
    const b = e.target.closest("button[data-act]");
    if (b) act(b.dataset.act, { channel: b.dataset.channel, band: b.dataset.band });
  });
}

function stateCell(a) {
  const notes = [];
  if (a.latched) notes.push("latched");
  if (a.acknowledged) notes.push("acknowledged");
  const td = el("td", {}, badge(a.state));
  if (notes.length) td.append(" ", el("span", { class: "note", text: notes.join(", ") }));
  return td;
}

function actions(a) {
  const td = el("td", { class: "actions" });
  const data = { "data-channel": a.channel, "data-band": a.band };
  if (a.latched && !a.acknowledged) {
    td.append(el("button", { type: "button", "data-act": "ack", ...data, text: "Acknowledge" }));
  }
  if (a.learning) {
    td.append(el("button", { type: "button", "data-act": "relearn", ...data, text: "Re-learn" }));
  }
  td.dataset.sig = `${a.latched}|${a.acknowledged}|${Boolean(a.learning)}`;
  return td;
}

function since(a) {
  if (!a.since) return "–";
  const d = new Date(a.since);
  return Number.isNaN(d.getTime()) ? a.since : d.toLocaleString();
}

function alarmRow(a) {
  const tr = el("tr", { "data-key": `${a.channel}/${a.band}`, "data-state": a.state },
    el("th", { scope: "row" }, el("a", { href: `#/channel/${encodeURIComponent(a.channel)}`, text: a.channel })),
    el("td", { text: a.band }),
    stateCell(a),
    el("td", { class: "num", text: a.value == null ? "–" : `${num(a.value, 4)} ${a.unit}` }),
    el("td", { class: "num", text: `${num(a.alert_limit)} / ${num(a.danger_limit)} ${a.unit}` }),
    el("td", { text: since(a) }),
    actions(a));
  if (a.state !== "normal") tr.classList.add("abnormal");
  return tr;
}

// Rebuilds rows in place; a row's buttons are kept (and keyboard focus on
// them) unless what they can do changed.
function updateAlarms(tbody, rows) {
  const old = new Map([...tbody.rows].map((r) => [r.dataset.key, r]));
  const same = tbody.rows.length === rows.length && rows.every((r, i) => tbody.rows[i].dataset.key === r.dataset.key);
  if (!same) { tbody.replaceChildren(...rows); return; }
  for (const r of rows) {
    const o = old.get(r.dataset.key);
    const cells = [...r.cells];
    const oldCells = [...o.cells];
    for (let i = 1; i < cells.length - 1; i++) oldCells[i].replaceWith(cells[i]);
    const last = cells.length - 1;
    if (oldCells[last].dataset.sig !== cells[last].dataset.sig) oldCells[last].replaceWith(cells[last]);
    o.dataset.state = r.dataset.state;
    o.className = r.className;
  }
}

function eventWhat(e) {
  const move = e.from || e.to ? `${e.from || "?"} → ${e.to || "?"}` : "";
  let text;
  if (e.kind === "transition") text = `${move}${e.cause ? ` (${e.cause})` : ""}`;
  else if (e.kind === "ack") text = `acknowledge${e.cause ? `: ${e.cause}` : ""}`;
  else if (e.kind === "health") text = `sensor health ${move}${e.reasons && e.reasons.length ? ` (reasons: ${e.reasons.join(", ")})` : ""}`;
  else text = `${e.kind}${e.cause ? ` ${e.cause}` : ""}`;
  return e.detail ? `${text} · ${e.detail}` : text;
}

function eventRow(e) {
  let cap = el("span", { class: "muted", text: "–" });
  if (e.capture) {
    cap = e.capture_status === "stored"
      ? el("a", { href: `#/event/${encodeURIComponent(e.capture)}`, text: "show capture" })
      : el("span", { text: `capture ${e.capture_status || "unknown"}${e.capture_lost_reason ? `: ${e.capture_lost_reason}` : ""}` });
  }
  const toState = ["alert", "danger", "inhibited"].includes(e.to) ? badge(e.to) : el("span", { text: e.to || "" });
  return el("tr", { "data-seq": String(e.seq) },
    el("td", { class: "num", text: String(e.seq) }),
    el("td", { class: "num", text: new Date(e.time).toLocaleString() }),
    el("td", { text: e.channel }),
    el("td", { text: e.band || "health" }),
    el("td", {}, toState, " ", el("span", { text: eventWhat(e) })),
    el("td", { class: "num", text: e.value == null ? "–" : num(e.value, 4) }),
    el("td", {}, cap));
}

export function start(setLink) {
  bindOnce();
  showToken();
  let lastEvents = "";
  refresh = async () => {
    try {
      const [al, ev] = await Promise.all([api.alarms(), api.events()]);
      $("alarm-caution").textContent = `Caution: ${al.caution}.`;
      updateAlarms($("alarm-table").querySelector("tbody"), al.alarms.map(alarmRow));
      const list = [...ev.events].reverse().slice(0, EVENTS_SHOWN);
      const sig = list.map((e) => `${e.seq}:${e.capture_status || ""}`).join(",");
      if (sig !== lastEvents) {
        lastEvents = sig;
        $("event-table").querySelector("tbody").replaceChildren(...list.map(eventRow));
      }
      $("event-count").textContent = `${ev.events.length} recent events (newest first; ${EVENTS_SHOWN} shown at most), ${ev.captures.length} stored captures${ev.lost_captures.length ? `, ${ev.lost_captures.length} lost` : ""}`;
      setLink(true, `live · updated ${new Date().toLocaleTimeString()}`);
    } catch (e) {
      setLink(false, `no data: ${e.message}`);
    }
  };
  return poller(() => refresh(), PERIOD_MS);
}
