// The alarm list: state, priority and evidence of every alarm not Normal; acknowledge and shelve with a
// token of the operator role (the service refuses without one, and the page says why).
//
// One clock: the times shown are sample times (the clock of the data), as the detectors judged them. An
// alarm's own "since" moves to the wall clock when someone acknowledges or shelves it, so the list shows
// the evidence's time instead: the sample time of the latest condition change (onset or clear).

import { get, post, explain } from "./api.js";
import { element, fill, number, stateBadge, time } from "./format.js";

const ORDER = { urgent: 0, high: 1, medium: 2, low: 3 };

// Sample time of the alarm's latest condition change (null while its condition never changed).
function conditionTime(alarm) {
  const t = alarm.evidence ? alarm.evidence.t : null;
  return Number.isFinite(t) ? t : null;
}

export class AlarmList {
  constructor(root) {
    this.root = root;
    this.alarms = [];
    this.message = null;
    this.error = null;
    this.drafts = new Map();          // alarm id -> {comment, minutes} typed so far: kept across refreshes
  }

  draft(id) {
    if (!this.drafts.has(id)) this.drafts.set(id, { comment: "", minutes: 60 });
    return this.drafts.get(id);
  }

  async refresh() {
    try {
      const answer = await get("/api/v1/alarms", { limit: 10000 });
      this.alarms = answer.alarms;
      this.error = null;
    } catch (error) {
      this.error = explain(error);
    }
    this.render();
  }

  // A transition from the live feed: replace that alarm in place, without asking the service again.
  update(alarm) {
    this.replace(alarm);
    this.render();
  }

  replace(alarm) {
    const others = this.alarms.filter((a) => a.id !== alarm.id);
    this.alarms = alarm.state === "Normal" ? others : [...others, alarm];
  }

  async act(alarm, action, body) {
    try {
      const answer = await post(`/api/v1/alarms/${encodeURIComponent(alarm.id)}/${action}`, body);
      this.drafts.delete(alarm.id);
      if (answer && answer.alarm) this.replace(answer.alarm);      // the service's word on the new state
      this.message = { ok: true, text: `${alarm.id}: ${action === "ack" ? "acknowledged" : action + "d"}.` };
    } catch (error) {
      this.message = { ok: false, text: `${alarm.id}: ${explain(error)}` };
    }
    this.render();
  }

  render() {
    // Unchanged since the last drawing: leave the page alone (a button being clicked, a field being typed in).
    const key = JSON.stringify([this.alarms, this.message, this.error]);
    if (key === this.drawn && this.root.firstChild) return;
    this.drawn = key;
    const sorted = this.alarms.slice().sort((a, b) => (ORDER[a.priority] - ORDER[b.priority])
      || ((conditionTime(b) || 0) - (conditionTime(a) || 0)));
    const rows = sorted.map((a) => {
      const draft = this.draft(a.id);
      const comment = element("input", { type: "text", class: "comment", "aria-label": `comment for ${a.id}`,
        placeholder: "comment", value: draft.comment, oninput: (e) => { draft.comment = e.target.value; } });
      const minutes = element("input", { type: "number", class: "minutes", min: 1, max: 10080, value: draft.minutes,
        oninput: (e) => { draft.minutes = Number(e.target.value); } });
      // A visible label around the field; the alarm's id is there for screen readers, the eye has the row.
      const shelveFor = element("label", { class: "shelve-for" }, "Shelve ",
        element("span", { class: "visually-hidden" }, `${a.id} `), "for ", minutes, " min");
      const canAck = a.state === "Unacknowledged" || a.state === "Return-to-normal unacknowledged";
      const canShelve = a.state !== "Shelved" && a.state !== "Out of service" && a.state !== "Suppressed by design";
      const e = a.evidence || {};
      return element("tr", { "data-alarm": a.id },
        element("td", {}, element("a", { href: `#/channel/${encodeURIComponent(a.channel)}` }, a.channel), ` ${a.kind}`),
        element("td", {}, stateBadge(a.state), a.active ? " condition present" : " condition cleared"),
        element("td", {}, a.priority),
        element("td", { class: "num since" }, time(conditionTime(a))),
        element("td", { class: "num" }, `${number(e.statistic)} / ${number(e.limit)}`),
        element("td", { class: "num" }, time(e.onset)),
        element("td", { class: "num" }, e.baseline === null || e.baseline === undefined ? "\u2014" : `v${e.baseline}`),
        element("td", {},
          comment, " ",
          element("button", { class: "ack", disabled: !canAck,
            onclick: () => this.act(a, "ack", { comment: draft.comment }) }, "Acknowledge"), " ",
          shelveFor, " ",
          element("button", { class: "shelve", disabled: !canShelve,
            onclick: () => this.act(a, "shelve", { comment: draft.comment, minutes: draft.minutes }) }, "Shelve"),
          a.state === "Shelved" ? element("button", { class: "unshelve",
            onclick: () => this.act(a, "unshelve", { comment: draft.comment }) }, "Unshelve") : null));
    });
    fill(this.root, 
      element("h1", {}, "Alarms"),
      this.error ? element("p", { class: "error", role: "alert" }, this.error) : null,
      this.message ? element("p", { class: this.message.ok ? "ok" : "error", role: "alert", id: "action-result" },
        this.message.text) : null,
      element("p", { id: "alarm-count" }, sorted.length === 1 ? "1 alarm not Normal."
        : sorted.length ? `${sorted.length} alarms not Normal.` : "No alarm is raised."),
      element("table", { id: "alarms" },
        element("thead", {}, element("tr", {},
          element("th", {}, "Alarm"), element("th", {}, "State"), element("th", {}, "Priority"),
          element("th", { class: "num", id: "since-heading",
            title: "sample time of the latest condition change (onset or clear)" }, "Since (sample time, UTC)"),
          element("th", { class: "num" }, "Statistic / limit"),
          element("th", { class: "num" }, "Onset (sample time, UTC)"), element("th", { class: "num" }, "Baseline"),
          element("th", {}, "Action (operator token)"))),
        element("tbody", {}, rows)));
  }
}
