// One channel: its parameters over time with +/- 2 standard-error bands, the noise sigma against its limit
// and baseline, each detector's statistic against its threshold, the residuals, alarm markers on the time
// axis, and a time range chosen from the stored history.

import { get, explain } from "./api.js";
import { timeChart } from "./chart.js";
import { alarmGroups, element, fill, number, qualityBadge, time } from "./format.js";

const RANGES = [["1 hour", 3600], ["6 hours", 6 * 3600], ["1 day", 86400], ["7 days", 7 * 86400],
  ["30 days", 30 * 86400], ["all", Infinity]];
const MARKED = new Set(["condition_on", "condition_off", "acknowledge", "shelve", "remove", "reset", "baseline"]);
const HISTORY_ROWS = 5000;

export class ChannelPage {
  constructor(root, id) {
    this.root = root;
    this.id = id;
    this.span = Infinity;
    this.custom = null;              // [from, until] in epoch seconds, when the user typed a range
    this.detail = null;
    this.rows = [];
    this.journal = [];
    this.error = null;
  }

  async refresh() {
    const path = `/api/v1/channels/${encodeURIComponent(this.id)}`;
    try {
      const params = { limit: HISTORY_ROWS };
      if (this.custom) {
        params.since = this.custom[0];
        params.until = this.custom[1];
      }
      const [detail, history, journal] = await Promise.all([
        get(path), get(`${path}/history`, params),
        get("/api/v1/alarms/journal", { channel: this.id, limit: 10000 })]);
      this.detail = detail;
      this.rows = history.rows;
      this.journal = journal.entries;
      this.error = null;
    } catch (error) {
      this.error = explain(error);
    }
    this.render();
  }

  range() {
    if (this.custom) return this.custom;
    const times = this.rows.map((r) => r.t);
    if (!times.length) return [0, 1];
    const last = times[times.length - 1];
    const first = Number.isFinite(this.span) ? Math.max(times[0], last - this.span) : times[0];
    return [first, last];
  }

  render() {
    if (!this.detail) {
      fill(this.root, element("h1", {}, this.id),
        element("p", { class: this.error ? "error" : "muted", role: this.error ? "alert" : null }, this.error || "Loading\u2026"));
      return;
    }
    const key = JSON.stringify([this.detail, this.rows.length, this.rows[this.rows.length - 1], this.journal.length,
      this.span, this.custom, this.error]);
    if (key === this.drawn && this.root.firstChild) return;       // nothing new: keep the page as it is
    this.drawn = key;
    const d = this.detail;
    const range = this.range();
    const markers = this.journal.filter((e) => MARKED.has(e.action)).map((e) => ({
      t: e.evidence && Number.isFinite(e.evidence.t) ? e.evidence.t : e.time,
      label: `${e.kind}: ${e.before} \u2192 ${e.after} (${e.action})`, short: e.kind }));
    const charts = [];
    d.terms.forEach((term, j) => {
      const points = this.rows.map((r) => [r.t, r.parameters ? r.parameters[j] : null]);
      const band = this.rows.map((r) => {
        const v = r.parameters ? r.parameters[j] : null;
        const se = r.std_errors ? r.std_errors[j] : null;
        return [r.t, v === null || se === null ? null : v - 2 * se, v === null || se === null ? null : v + 2 * se];
      });
      const series = [{ type: "band", points: band, name: "band" }, { type: "line", points, name: "estimate" }];
      const reference = d.baseline && d.baseline.parameters ? d.baseline.parameters[term] : null;
      if (Number.isFinite(reference)) series.push({ type: "reference", points: [[range[0], reference], [range[1], reference]], name: "baseline" });
      charts.push(figure(`parameter ${term}`, `parameter-${j}`, series, markers, range,
        `${number(d.parameters[term], 6)} \u00b1 ${number(d.std_errors[term], 3)} (1 s.e.)`,
        [["line", "estimate"], ["band", "\u00b1 2 s.e."], ["reference", "baseline"]]));
    });
    const sigma = this.rows.map((r) => [r.t, r.noise_sigma]);
    const sigmaSeries = [{ type: "line", points: sigma, name: "noise sigma" }];
    const noiseLimit = d.detectors && d.detectors.noise_level ? d.detectors.noise_level.limit : null;
    const limitPoints = this.rows.map((r) => [r.t, r.limits ? r.limits.noise_level : null]);
    sigmaSeries.push({ type: "limit", points: limitPoints.some((p) => Number.isFinite(p[1])) ? limitPoints
      : (Number.isFinite(noiseLimit) ? [[range[0], noiseLimit], [range[1], noiseLimit]] : []), name: "limit" });
    if (d.baseline && Number.isFinite(d.baseline.noise_sigma)) {
      sigmaSeries.push({ type: "reference", points: [[range[0], d.baseline.noise_sigma], [range[1], d.baseline.noise_sigma]], name: "baseline" });
    }
    charts.push(figure("noise sigma", "noise-sigma", sigmaSeries, markers, range,
      `${number(d.noise_sigma)} (limit ${number(noiseLimit)}, baseline ${number(d.baseline ? d.baseline.noise_sigma : null)})`,
      [["line", "noise sigma"], ["limit", "limit"], ["reference", "baseline sigma"]]));
    for (const kind of ["offset", "variance", "drift"]) {
      const reading = d.detectors ? d.detectors[kind] : null;
      if (!reading) continue;
      const stat = this.rows.map((r) => [r.t, r.detectors ? r.detectors[kind] : null]);
      const limits = this.rows.map((r) => [r.t, r.limits ? r.limits[kind] : null]);
      const limitSeries = limits.some((p) => Number.isFinite(p[1])) ? limits
        : (Number.isFinite(reading.limit) ? [[range[0], reading.limit], [range[1], reading.limit]] : []);
      charts.push(figure(`${kind} statistic`, `detector-${kind}`,
        [{ type: "line", points: stat, name: "statistic" }, { type: "limit", points: limitSeries, name: "threshold" }],
        markers, range, `${number(reading.statistic)} (threshold ${number(reading.limit)})${reading.active ? ", condition present" : ""}`,
        [["line", "statistic"], ["limit", "threshold"]]));
    }
    const residuals = this.rows.map((r) => [r.t, r.residual]);
    const spread = this.rows.map((r) => [r.t, Number.isFinite(r.residual_spread) ? -2 * r.residual_spread : null,
      Number.isFinite(r.residual_spread) ? 2 * r.residual_spread : null]);
    const lastResidual = this.rows.length ? this.rows[this.rows.length - 1].residual : null;
    charts.push(figure("residuals (innovation of the sample at each history row)", "residuals",
      [{ type: "band", points: spread, name: "band" }, { type: "points", points: residuals, name: "residual" }],
      markers, range, `${number(lastResidual)}`, [["points", "residual"], ["band", "\u00b1 2 predicted s.d."]]));

    fill(this.root, 
      element("h1", {}, `Channel ${d.id} `, qualityBadge(d.quality, d.quality_reason)),
      this.error ? element("p", { class: "error", role: "alert" }, this.error) : null,
      element("p", {}, `Last sample ${time(d.t)}; ${d.samples} samples applied, ${d.rejected} rejected; `,
        `forgetting factor ${d.forgetting_factor}, weighting ${d.weighting}. `, d.quality_reason ? `Quality: ${d.quality_reason}.` : ""),
      parameterTable(d),
      alarmLine(d),
      this.controls(),
      element("p", { class: "muted", id: "history-count" }, `${this.rows.length} history rows, ${time(range[0])} to ${time(range[1])}.`),
      element("div", { class: "charts" }, charts));
  }

  controls() {
    const preset = element("select", { id: "range", onchange: (e) => {
      this.custom = null;
      this.span = Number(e.target.value);
      this.refresh();
    } }, RANGES.map(([name, seconds]) => element("option", { value: seconds, selected: !this.custom && seconds === this.span }, name)));
    const from = element("input", { type: "datetime-local", id: "range-from", step: 1 });
    const until = element("input", { type: "datetime-local", id: "range-until", step: 1 });
    if (this.custom) {
      from.value = local(this.custom[0]);
      until.value = local(this.custom[1]);
    }
    const apply = element("button", { id: "range-apply", onclick: () => {
      const a = Date.parse(from.value + "Z") / 1000;
      const b = Date.parse(until.value + "Z") / 1000;
      if (Number.isFinite(a) && Number.isFinite(b) && b > a) {
        this.custom = [a, b];
        this.refresh();
      }
    } }, "Show");
    return element("div", { class: "controls" },
      element("label", {}, "Time range (back from the newest row)", preset),
      element("label", {}, "From (UTC)", from), element("label", {}, "Until (UTC)", until), apply);
  }
}

function local(seconds) {
  return new Date(seconds * 1000).toISOString().slice(0, 19);
}

function parameterTable(d) {
  return element("table", { class: "params", id: "parameters" },
    element("thead", {}, element("tr", {}, element("th", {}, "Term"), element("th", { class: "num" }, "Estimate"),
      element("th", { class: "num" }, "Std. error"), element("th", { class: "num" }, "95 % interval"),
      element("th", { class: "num" }, "Baseline"))),
    element("tbody", {}, d.terms.map((term) => {
      const interval = d.intervals_95 ? d.intervals_95[term] : null;
      return element("tr", { "data-term": term },
        element("td", {}, term),
        element("td", { class: "num estimate" }, number(d.parameters[term], 8)),
        element("td", { class: "num" }, number(d.std_errors[term], 4)),
        element("td", { class: "num" }, interval ? `${number(interval[0], 6)} to ${number(interval[1], 6)}` : "\u2014"),
        element("td", { class: "num" }, d.baseline && d.baseline.parameters ? number(d.baseline.parameters[term], 6) : "\u2014"));
    })));
}

function alarmLine(d) {
  const raised = (d.alarms || []).filter((a) => a.state !== "Normal");
  if (!raised.length) return element("p", { id: "channel-alarms" }, "No alarm raised on this channel.");
  return element("p", { id: "channel-alarms" }, "Alarms: ",
    alarmGroups(raised),
    element("a", { href: "#/alarms" }, "to the alarm list"));
}

// keys: [[kind, label], ...] for the legend, kind one of line, band, limit, reference, points.
function figure(title, id, series, markers, range, latest, keys) {
  const swatch = { line: "key-line", band: "key-band", limit: "key-limit", reference: "key-reference", points: "key-point" };
  return element("figure", { id: `chart-${id}` },
    element("figcaption", {}, `${title}: `, element("span", { class: "latest" }, latest)),
    timeChart({ series, markers, range, title }),
    element("p", { class: "legend" }, keys.map(([kind, text]) => element("span", {}, element("i", { class: swatch[kind] }), text)),
      markers.length ? element("span", {}, element("i", { class: "key-marker" }), "alarm transition") : null));
}
