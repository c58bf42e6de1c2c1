// Every channel at a glance: quality and alarm state written out, filtered and searched, a page at a time
// (the table holds one page, so thousands of channels cost no more to show than a hundred).

import { get, explain } from "./api.js";
import { alarmGroups, element, fill, number, qualityBadge, time } from "./format.js";

const PAGE = 100;
const RANK = { Bad: 0, Uncertain: 1, Good: 2 };

export class Overview {
  constructor(root) {
    this.root = root;
    this.channels = [];
    this.page = 0;
    this.filter = { text: "", quality: "", alarmed: false };
    this.error = null;
  }

  async refresh() {
    try {
      this.channels = await get("/api/v1/channels");
      this.error = null;
    } catch (error) {
      this.error = explain(error);
    }
    this.render();
  }

  chosen() {
    const text = this.filter.text.trim().toLowerCase();
    return this.channels
      .filter((c) => !text || c.id.toLowerCase().includes(text))
      .filter((c) => !this.filter.quality || c.quality === this.filter.quality)
      .filter((c) => !this.filter.alarmed || raised(c).length > 0)
      .sort((a, b) => (unacknowledged(b) - unacknowledged(a)) || (RANK[a.quality] - RANK[b.quality])
        || a.id.localeCompare(b.id));
  }

  render() {
    const key = JSON.stringify([this.channels, this.filter, this.page, this.error]);
    if (key === this.drawn && this.root.firstChild) return;       // nothing new: keep the page as it is
    this.drawn = key;
    const chosen = this.chosen();
    const pages = Math.max(1, Math.ceil(chosen.length / PAGE));
    this.page = Math.min(this.page, pages - 1);
    const shown = chosen.slice(this.page * PAGE, (this.page + 1) * PAGE);
    const counts = { Good: 0, Uncertain: 0, Bad: 0 };
    for (const c of this.channels) counts[c.quality] += 1;

    const search = element("input", { type: "search", id: "channel-search", value: this.filter.text,
      placeholder: "part of a channel id", oninput: (e) => { this.filter.text = e.target.value; this.page = 0; this.render(); this.focus("channel-search"); } });
    const quality = element("select", { id: "quality-filter", onchange: (e) => { this.filter.quality = e.target.value; this.page = 0; this.render(); } },
      ["", "Good", "Uncertain", "Bad"].map((q) => element("option", { value: q, selected: q === this.filter.quality },
        q ? `${q} (${counts[q]})` : `any (${this.channels.length})`)));
    const alarmed = element("input", { type: "checkbox", id: "alarmed-only", checked: this.filter.alarmed,
      onchange: (e) => { this.filter.alarmed = e.target.checked; this.page = 0; this.render(); } });

    const rows = shown.map((c) => element("tr", { "data-channel": c.id },
      element("td", {}, element("a", { href: `#/channel/${encodeURIComponent(c.id)}` }, c.id)),
      element("td", {}, qualityBadge(c.quality, c.quality_reason), " ", element("span", { class: "muted" }, c.quality_reason || "")),
      element("td", { class: "alarms" },
        c.commissioning ? element("span", { class: "commissioning" }, commissioningText(c.commissioning)) : null,
        c.commissioning && raised(c).length ? " " : null,
        raised(c).length ? alarmGroups(raised(c))
          : c.commissioning ? null : element("span", { class: "muted" }, "none raised")),
      element("td", { class: "num" }, time(c.t)),
      element("td", { class: "num" }, number(c.samples, 6)),
      element("td", { class: "num" }, number(c.rejected, 6))));

    fill(this.root, 
      element("h1", {}, "Channels"),
      this.error ? element("p", { class: "error", role: "alert" }, this.error) : null,
      element("div", { class: "controls" },
        element("label", {}, "Search", search),
        element("label", {}, "Quality", quality),
        element("label", {}, element("span", {}, "Raised alarms only"), alarmed)),
      element("p", { id: "channel-count" },
        `${chosen.length} of ${this.channels.length} channels: ${counts.Good} Good, ${counts.Uncertain} Uncertain, ${counts.Bad} Bad.`),
      element("table", { id: "channels" },
        element("thead", {}, element("tr", {},
          element("th", {}, "Channel"), element("th", {}, "Quality"), element("th", {}, "Alarms"),
          element("th", { class: "num" }, "Last sample (UTC)"), element("th", { class: "num" }, "Samples"),
          element("th", { class: "num" }, "Rejected"))),
        element("tbody", {}, rows)),
      element("div", { class: "pager" },
        element("button", { id: "page-previous", disabled: this.page === 0, onclick: () => { this.page -= 1; this.render(); } }, "Previous page"),
        element("span", { id: "page-label" }, `Page ${this.page + 1} of ${pages}`),
        element("button", { id: "page-next", disabled: this.page >= pages - 1, onclick: () => { this.page += 1; this.render(); } }, "Next page")));
  }

  focus(id) {
    const node = document.getElementById(id);
    if (node) {
      node.focus();
      node.setSelectionRange?.(node.value.length, node.value.length);
    }
  }
}

// The alarms a channel has raised. While it commissions (no baseline yet) its detector alarms are held back
// by design: that is the commissioning, shown as such, not four raised alarms.
function raised(channel) {
  const all = channel.alarms ? channel.alarms.raised : [];
  return channel.commissioning ? all.filter((a) => a.state !== "Suppressed by design") : all;
}

function commissioningText({ done, needed }) {
  return needed > 0 ? `commissioning (${done} of ${needed} samples)`
    : `commissioning (${done} samples; no baseline until one is set)`;
}

function unacknowledged(channel) {
  return channel.alarms ? channel.alarms.unacknowledged : 0;
}
