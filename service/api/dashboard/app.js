// The dashboard's entry: a view per location hash (#/, #/channel/<id>, #/alarms), the token field, the live
// feed, and a refresh every few seconds so that values keep up even between alarm transitions.

import { setToken, token } from "./api.js";
import { AlarmList } from "./alarms.js";
import { ChannelPage } from "./channel.js";
import { LiveFeed } from "./live.js";
import { Overview } from "./overview.js";

const REFRESH_MS = 5000;
const root = document.getElementById("view");
const status = document.getElementById("live");
let view = null;
let timer = null;

function route() {
  const hash = location.hash || "#/";
  const channel = hash.match(/^#\/channel\/(.+)$/);
  if (channel) view = new ChannelPage(root, decodeURIComponent(channel[1]));
  else if (hash === "#/alarms") view = new AlarmList(root);
  else view = new Overview(root);
  for (const link of document.querySelectorAll("nav a")) {
    const current = (link.dataset.view === "alarms") === (hash === "#/alarms") && !channel;
    if (current) link.setAttribute("aria-current", "page");
    else link.removeAttribute("aria-current");
  }
  document.title = channel ? `rwls: ${decodeURIComponent(channel[1])}` : hash === "#/alarms" ? "rwls: alarms" : "rwls: channels";
  view.render();
  refresh();
}

async function refresh() {
  clearTimeout(timer);
  const current = view;
  try {
    await current.refresh();
  } finally {
    if (current === view) timer = setTimeout(refresh, REFRESH_MS);
  }
}

// Several transitions often arrive together: one refresh for all of them.
let pending = null;
function soon() {
  clearTimeout(pending);
  pending = setTimeout(refresh, 200);
}

let received = 0;
const feed = new LiveFeed((event) => {
  received += 1;
  document.body.dataset.events = String(received);     // how many live events arrived (tests read it)
  if (event.type === "alarm" && view instanceof AlarmList) view.update(event.alarm);
  if (event.type === "alarm" || event.type === "alarms" || event.type === "overflow") soon();
}, (state, text) => {
  status.dataset.state = state;
  status.textContent = text;
});

document.getElementById("token-form").addEventListener("submit", (event) => event.preventDefault());
const field = document.getElementById("token");
field.value = token();
field.addEventListener("change", () => {
  setToken(field.value.trim());
  feed.restart();
  refresh();
});

window.addEventListener("hashchange", route);
route();
feed.start();
