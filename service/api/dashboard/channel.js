// One channel: its parameters over time with +/- 2 standard-error bands, the noise sigma against its limit
// and baseline, each detector's statistic against its threshold, the residuals, alarm markers on the time
// axis, and a time range chosen from the stored history (typed as ISO 8601 UTC, never in the browser's locale).
//
// The parameter trends leave out, unless asked, the start-up transient: the rows before commissioning ended
// (the time of the baseline in force). The first samples' estimates swing far wider than anything after, and
// an axis scaled to them flattens the rest of the curve.

import { get, explain } from "./api.js";
import { timeChart } from "./chart.js";
import { alarmGroups, element, fill, number, parseUtc, qualityBadge, time, UTC_EXAMPLE, UTC_PATTERN } from "./format.js";

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
    this.showTransient = false;
    this.typed = { from: "", until: "" };   // the range fields as typed (kept across redrawings)
    this.rangeError = null;                 // {field, text} when the typed range was refused
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
      this.span, this.custom, this.error, this.showTransient, this.rangeError]);
    if (key === this.drawn && this.root.firstChild) return;       // nothing new: keep the page as it is
    this.drawn = key;
    const focused = document.activeElement && this.root.contains(document.activeElement) ? document.activeElement.id : null;
    const d = this.detail;
    const range = this.range();
    // Commissioning ended when the baseline in force was taken; the rows before it are the start-up transient.
    const settled = d.baseline && Number.isFinite(d.baseline.t) ? d.baseline.t : null;
    const trendRows = this.showTransient || settled === null ? this.rows : this.rows.filter((r) => r.t >= settled);
    const hidden = this.rows.length - trendRows.length;
    const markers = this.journal.filter((e) => MARKED.has(e.action)).map((e) => ({
      t: e.evidence && Number.isFinite(e.evidence.t) ? e.evidence.t : e.time,
      label: `${e.kind}: ${e.before} \u2192 ${e.after} (${e.action})`, short: e.kind }));
    const charts = [];
    d.terms.forEach((term, j) => {
      const points = trendRows.map((r) => [r.t, r.parameters ? r.parameters[j] : null]);
      const band = trendRows.map((r) => {
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
      this.controls(settled),
      this.rangeError ? element("p", { class: "error", role: "alert", id: "range-error" }, this.rangeError.text) : null,
      element("p", { class: "muted", id: "history-count" },
        `${this.rows.length} history rows, ${time(range[0])} to ${time(range[1])} (sample time, UTC).`),
      element("p", { class: "muted", id: "transient-note" }, settled === null
        ? "No baseline yet (commissioning): the parameter trends show every row."
        : hidden > 0 ? `Parameter trends: the start-up transient (${hidden} rows before commissioning ended at ${time(settled)}) is left out, and out of their scale; tick "show start-up transient" to see it.`
          : this.showTransient ? "Parameter trends: the start-up transient is shown." : "Parameter trends: no start-up transient in this range."),
      element("div", { class: "charts" }, charts));
    if (focused) {                             // a redrawing while someone types keeps their place
      const node = document.getElementById(focused);
      if (node) {
        node.focus();
        if (node.type === "text") node.setSelectionRange(node.value.length, node.value.length);
      }
    }
  }

  controls(settled) {
    const preset = element("select", { id: "range", onchange: (e) => {
      this.custom = null;
      this.typed = { from: "", until: "" };
      this.rangeError = null;
      this.span = Number(e.target.value);
      this.refresh();
    } }, RANGES.map(([name, seconds]) => element("option", { value: seconds, selected: !this.custom && seconds === this.span }, name)));
    const field = (name) => element("input", { type: "text", class: "utc", id: `range-${name}`, value: this.typed[name],
      pattern: UTC_PATTERN, placeholder: UTC_EXAMPLE, autocomplete: "off", spellcheck: "false",
      "aria-describedby": "range-hint", "aria-invalid": this.rangeError && this.rangeError.field === name ? "true" : null,
      oninput: (e) => { this.typed[name] = e.target.value; } });
    const apply = element("button", { id: "range-apply", onclick: () => this.applyRange() }, "Show");
    const transient = element("input", { type: "checkbox", id: "show-transient", checked: this.showTransient,
      disabled: settled === null, onchange: (e) => { this.showTransient = e.target.checked; this.render(); } });
    return [
      element("div", { class: "controls" },
        element("label", {}, "Time range (back from the newest row)", preset),
        element("label", {}, "From (UTC)", field("from")), element("label", {}, "Until (UTC)", field("until")), apply,
        element("label", { class: "check", title: settled === null ? "no baseline yet: every row is shown" : null },
          transient, "show start-up transient")),
      element("p", { class: "muted hint", id: "range-hint" },
        `From and Until: ISO 8601 in UTC, e.g. ${UTC_EXAMPLE} (seconds optional, the Z required).`)];
  }

  // The typed range, checked: both times ISO 8601 UTC and Until after From; else say which field and why.
  applyRange() {
    const [a, b] = [parseUtc(this.typed.from), parseUtc(this.typed.until)];
    const wrong = (name, label) => ({ field: name,
      text: `${label}: "${this.typed[name].trim()}" is not a UTC time in ISO 8601 form such as ${UTC_EXAMPLE}.` });
    if (a === null) this.rangeError = wrong("from", "From");
    else if (b === null) this.rangeError = wrong("until", "Until");
    else if (!(b > a)) this.rangeError = { field: "until", text: "Until must be after From." };
    else this.rangeError = null;
    if (this.rangeError) {
      this.render();
      document.getElementById(`range-${this.rangeError.field}`)?.focus();
      return;
    }
    this.custom = [a, b];
    this.typed = { from: time(a), until: time(b) };
    this.refresh();
  }
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
  const commissioning = !d.baseline;
  // While commissioning the detector alarms are held back by design: said once, not listed as raised.
  const raised = (d.alarms || []).filter((a) => a.state !== "Normal" && !(commissioning && a.state === "Suppressed by design"));
  const note = commissioning ? element("span", { class: "commissioning", id: "channel-commissioning" },
    `commissioning (${d.commissioned} samples so far, no baseline yet; detector alarms held back by design)`) : null;
  if (!raised.length) return element("p", { id: "channel-alarms" }, note || "No alarm raised on this channel.");
  return element("p", { id: "channel-alarms" }, note, note ? " " : null, "Alarms: ",
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
