// The page's entry: picks the view from the address (#/ or
// #/channel/NAME) and keeps the chosen one updated.

import * as overview from "./overview.js";
import * as channelView from "./channel.js";

const linkState = document.getElementById("link-state");
let current = null;

export function setLink(ok, text) {
  linkState.textContent = text;
  linkState.classList.toggle("st-fault", !ok);
}

function route() {
  const m = location.hash.match(/^#\/channel\/(.+)$/);
  if (current) current.stop();
  document.getElementById("overview").hidden = Boolean(m);
  document.getElementById("channel").hidden = !m;
  current = m ? channelView.start(decodeURIComponent(m[1]), setLink) : overview.start(setLink);
}

window.addEventListener("hashchange", route);
route();
