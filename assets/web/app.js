// The page's entry: picks the view from the address (#/, #/channel/NAME,
// #/alarms, #/event/ID, #/history/NAME) and keeps the chosen one updated.

import * as overview from "./overview.js";
import { getJSON } from "./api.js";
import { navLinks } from "./ui.js";
import * as channelView from "./channel.js";
import * as alarmsView from "./alarms.js";
import * as captureView from "./capture.js";
import * as historyView from "./history.js";

const linkState = document.getElementById("link-state");
let current = null;

export function setLink(ok, text) {
  linkState.textContent = text;
  linkState.classList.toggle("st-fault", !ok);
}

const VIEWS = [
  [/^#\/channel\/(.+)$/, "channel", (m) => channelView.start(decodeURIComponent(m[1]), setLink)],
  [/^#\/alarms$/, "alarms", () => alarmsView.start(setLink)],
  [/^#\/history(?:\/(.+))?$/, "history", (m) => historyView.start(m[1] ? decodeURIComponent(m[1]) : null, setLink)],
  [/^#\/event\/(.+)$/, "capture", (m) => captureView.start(decodeURIComponent(m[1]), setLink)],
  [/^/, "overview", () => overview.start(setLink)],
];

function route() {
  if (current) current.stop();
  const [re, id, start] = VIEWS.find(([r]) => r.test(location.hash));
  for (const [, other] of VIEWS) document.getElementById(other).hidden = other !== id;
  for (const a of document.querySelectorAll("header nav a")) {
    if (a.getAttribute("href") === location.hash || (a.id === "nav-overview" && id === "overview") || (a.id === "nav-history" && id === "history")) a.setAttribute("aria-current", "page");
    else a.removeAttribute("aria-current");
  }
  current = start(location.hash.match(re));
}

window.addEventListener("hashchange", route);
route();
// The channel links, whatever view the page was opened on.
getJSON("/api/v1/channels").then((l) => navLinks(l.channels.map((c) => c.name))).catch(() => {});
