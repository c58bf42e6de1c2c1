"""The commissioning report of ``rwls replay --report``: one self-contained HTML file (plots embedded as PNG).

Order: what was run (data, configuration, overrides) and the advisory notice; a summary table, one row
per channel; then a section per channel with its estimates, the plots (parameters with bands, noise
sigma against its limit, detector statistics against thresholds, innovations), the alarms the run
would have raised, and OLS against WLS on the same samples. The numbers are those of ``--json``
(embedded as well, in ``<script type="application/json" id="replay-json">``).
"""

from __future__ import annotations

import base64
import html
import json
import math
import time
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from service.alarms.lifecycle import JournalAction
from service.engine.channel_report import ChannelReport
from service.offline.ols_vs_wls import Comparison, compare
from service.offline.replay import RunResult
from service.offline.trace import ChannelTrace, ReplayTrace

__all__ = ["build_report"]

STYLE = """
body { font: 15px/1.45 system-ui, "DejaVu Sans", sans-serif; color: #111; max-width: 60rem; margin: 1rem auto;
       padding: 0 1rem; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.3rem; margin-top: 2.2rem; border-bottom: 2px solid #111; }
h3 { font-size: 1.05rem; margin: 1.2rem 0 .3rem; }
table { border-collapse: collapse; margin: .4rem 0 1rem; }
th, td { border-bottom: 1px solid #999; padding: .2rem .55rem; text-align: left; vertical-align: top; }
th { border-bottom: 2px solid #111; } td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
.advisory { background: #fff8d6; border: 2px solid #111; padding: .5rem .8rem; }
img { max-width: 100%; display: block; margin: .2rem 0 .6rem; }
.muted { color: #555; }
"""


def _num(value: Any, digits: int = 10) -> str:
    if value is None or not isinstance(value, int | float) or not math.isfinite(value):
        return "\u2014"
    return f"{value:.{digits}g}"


def _e(text: object) -> str:
    return html.escape(str(text))


def _img(png: bytes, alt: str) -> str:
    return f'<img alt="{_e(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode()}">'


def _when(t: Any) -> str:
    if not isinstance(t, int | float) or not math.isfinite(t):
        return "\u2014"
    return time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(t)) if t > 1e8 else f"sample {t:.0f}"


def _comparison(trace: ChannelTrace | None) -> Comparison | None:
    if trace is None or not trace.Z:
        return None
    return compare(np.array(trace.Z), np.array(trace.y), np.array(trace.weight))


def _gain_text(c: Comparison | None) -> str:
    if c is None:
        return "\u2014"
    if not c.weights_vary:
        return "1 (equal weights: WLS is OLS)"
    finite = c.gain[np.isfinite(c.gain)]
    if not finite.size:
        return "\u2014"
    low, high = f"{finite.min():.3g}", f"{finite.max():.3g}"
    return low if low == high else f"{low} to {high}"


def _summary(result: RunResult, comparisons: dict[str, Comparison | None]) -> str:
    rows = []
    for cid, ch in result.channels.items():
        params = "<br>".join(f"{_e(term)} = <span class=\"estimate\" data-term=\"{_e(term)}\">"
                             f"{_num(ch['parameters'][term])}</span> \u00b1 {_num(ch['std_errors'][term], 4)}"
                             for term in ch["terms"])
        fired = [a for a in ch["alarms"] if a["action"] == JournalAction.CONDITION_ON]
        kinds = ", ".join(sorted({str(a["kind"]) for a in fired})) or "none"
        rows.append(
            f'<tr data-channel="{_e(cid)}"><td><a href="#channel-{_e(cid)}">{_e(cid)}</a></td>'
            f'<td class="num samples">{ch["samples"]}</td><td class="num rejected">{ch["rejected"]}</td>'
            f'<td>{_e(ch["weighting"])}, \u03bb = {_num(ch["forgetting_factor"], 6)}</td><td>{params}</td>'
            f'<td class="num noise">{_num(ch["noise_sigma"])}</td>'
            f'<td class="alarms" data-count="{len(fired)}">{len(fired)}: {_e(kinds)}</td>'
            f"<td>{_e(_gain_text(comparisons[cid]))}</td></tr>")
    return ('<table id="summary"><thead><tr><th>Channel</th><th class="num">Samples</th>'
            '<th class="num">Rejected</th><th>Weighting</th><th>Final estimates \u00b1 1 s.e.</th>'
            '<th class="num">Noise sigma</th><th>Alarms that would have fired</th><th>WLS efficiency gain</th>'
            f'</tr></thead><tbody>{"".join(rows)}</tbody></table>')


def _interval(bounds: list[float] | None, end: int) -> float | None:
    return None if bounds is None else bounds[end]


def _estimates(ch: ChannelReport) -> str:
    baseline = ch["baseline"]
    ref: dict[str, float] = {} if baseline is None else baseline["parameters"]
    rows = "".join(
        f'<tr data-term="{_e(t)}"><td>{_e(t)}</td><td class="num">{_num(ch["parameters"][t])}</td>'
        f'<td class="num">{_num(ch["std_errors"][t], 6)}</td>'
        f'<td class="num">{_num(_interval(ch["intervals_95"][t], 0), 8)} to '
        f'{_num(_interval(ch["intervals_95"][t], 1), 8)}</td>'
        f'<td class="num">{_num(ref.get(t), 8)}</td></tr>' for t in ch["terms"])
    return ('<table class="estimates"><thead><tr><th>Term</th><th class="num">Estimate</th>'
            '<th class="num">Std. error</th><th class="num">95 % interval</th><th class="num">Baseline</th></tr>'
            f"</thead><tbody>{rows}</tbody></table>")


def _alarm_table(alarms: Sequence[dict[str, Any]]) -> str:
    if not alarms:
        return '<p class="alarms-none">No alarm would have been raised.</p>'
    rows = "".join(
        # Journal actions in words for people (the JSON keeps the codes).
        f'<tr><td>{_e(a["kind"])}</td><td>{_e(JournalAction(a["action"]).words)}</td>'
        f'<td>{_e(a["state"])}</td>'
        f'<td>{_when(a.get("t", a.get("sample")))}</td><td class="num">{_num(a.get("statistic"), 6)}</td>'
        f'<td class="num">{_num(a.get("limit"), 6)}</td><td>{_when(a.get("onset"))}</td>'
        f'<td>{_e(a.get("baseline") if a.get("baseline") is not None else "—")}</td></tr>' for a in alarms)
    return ('<table class="alarms"><thead><tr><th>Alarm</th><th>Transition</th><th>To</th><th>When</th>'
            '<th class="num">Statistic</th><th class="num">Limit</th><th>Estimated onset</th><th>Baseline</th>'
            f"</tr></thead><tbody>{rows}</tbody></table>")


def _comparison_table(terms: Sequence[str], c: Comparison | None) -> str:
    if c is None:
        return '<p class="muted">Too few samples, or a design without full rank, for the batch fits.</p>'
    rows = "".join(
        f'<tr data-term="{_e(t)}"><td>{_e(t)}</td><td class="num">{_num(c.ols[j])}</td>'
        f'<td class="num">{_num(c.ols_se[j], 5)}</td><td class="num">{_num(c.ols_se_robust[j], 5)}</td>'
        f'<td class="num">{_num(c.wls[j])}</td><td class="num">{_num(c.wls_se[j], 5)}</td>'
        f'<td class="num">{_num(c.wls_se_robust[j], 5)}</td>'
        f'<td class="num gain">{_num(c.gain[j], 4)}</td></tr>' for j, t in enumerate(terms))
    note = ("" if c.weights_vary else
            '<p class="muted">Every sample had the same weight, so WLS is OLS here (the channel uses '
            "<code>unit</code> weighting without weight rules) and the gain is exactly 1.</p>")
    return (f'<p>Batch fits over all {c.samples} applied samples, no forgetting. The efficiency gain is '
            "(OLS s.e. HC0 / WLS s.e. HC0)\u00b2, both heteroscedasticity-consistent so that only the weighting "
            "differs: how many times as many samples OLS would need for the precision WLS has (below 1: the "
            "weights cost precision, as an engineering weight rule may).</p>"
            '<table class="comparison"><thead><tr><th>Term</th><th class="num">OLS estimate</th>'
            '<th class="num">OLS s.e. (textbook)</th><th class="num">OLS s.e. (HC0, robust)</th>'
            '<th class="num">WLS estimate</th><th class="num">WLS s.e. (textbook)</th>'
            '<th class="num">WLS s.e. (HC0, robust)</th><th class="num">Gain</th></tr></thead>'
            f"<tbody>{rows}</tbody></table>{note}")


def _plots(cid: str, ch: ChannelReport, trace: ChannelTrace | None) -> str:
    if trace is None or not trace.t:
        return '<p class="muted">No sample was applied: nothing to plot.</p>'
    from service.offline import report_plots as plots  # matplotlib only when a report is asked for

    alarm_times = [float(a["t"]) for a in ch.get("alarms", [])
                   if a["action"] == JournalAction.CONDITION_ON and "t" in a]
    baseline = ch["baseline"]
    ref: dict[str, float] = {} if baseline is None else baseline["parameters"]
    parts = [_img(plots.parameter_plot(trace, j, term, ref.get(term), alarm_times), f"{cid} parameter {term}")
             for j, term in enumerate(ch["terms"])]
    parts.append(_img(plots.sigma_plot(trace, None if baseline is None else baseline["noise_sigma"], alarm_times),
                      f"{cid} noise sigma"))
    for kind in ("offset", "variance", "drift"):
        parts.append(_img(plots.detector_plot(trace, kind, alarm_times), f"{cid} {kind} statistic"))
    parts.append(_img(plots.residual_plot(trace, alarm_times), f"{cid} innovations"))
    stride = f" (every {trace.stride}th sample)" if trace.stride > 1 else ""
    return f'<p class="muted">{len(trace.t)} points{stride}.</p>' + "".join(parts)


def _not_formed(counts: dict[str, int] | None) -> str:
    """A channel assembled from tags: the output updates that formed no sample, by reason (none: nothing)."""
    if not counts:
        return ""
    reasons = ", ".join(f"{_e(reason)} {n}" for reason, n in counts.items())
    return (f'<p class="not-formed">{sum(counts.values())} output tag updates formed no sample '
            f"(the tag messages were fine): {reasons}.</p>")


def build_report(result: RunResult, trace: ReplayTrace, *, data: str, config: str, advisory: str,
                 overrides: dict[str, float], progress: Callable[[str], None] | None = None) -> str:
    """The report as one HTML document."""
    comparisons = {cid: _comparison(trace.channels.get(cid)) for cid in result.channels}
    settings = ", ".join(f"{_e(k)} = {_num(v, 8)}" for k, v in overrides.items()) or "none (the file's settings)"
    sections = []
    for cid, ch in result.channels.items():
        if progress is not None:
            progress(cid)
        sections.append(
            f'<section class="channel" id="channel-{_e(cid)}" data-channel="{_e(cid)}"><h2>Channel {_e(cid)}</h2>'
            f'<p>{ch["samples"]} samples applied, {ch["rejected"]} rejected, {ch["warmup"]} warm-up; weighting '
            f'{_e(ch["weighting"])}, forgetting factor {_num(ch["forgetting_factor"], 8)}.</p>'
            f"{_not_formed(result.samples_not_formed.get(cid))}"
            f"<h3>Final estimates</h3>{_estimates(ch)}"
            f"<h3>Trends</h3>{_plots(cid, ch, trace.channels.get(cid))}"
            f'<h3>Alarms that would have fired</h3>{_alarm_table(ch["alarms"])}'
            f"<h3>OLS against WLS on the same samples</h3>{_comparison_table(ch['terms'], comparisons[cid])}"
            "</section>")
    data_block = json.dumps(result.to_json(), allow_nan=False).replace("</", "<\\/")
    generated = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    return ("<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>rwls commissioning report: {_e(data)}</title><style>{STYLE}</style></head><body>"
            f"<h1>Commissioning report</h1><p class=\"advisory\"><strong>Advisory use only.</strong> {_e(advisory)}"
            "</p>"
            f"<p>Data <code>{_e(data)}</code> ({result.rows} rows, {result.bad_rows} refused), configuration "
            f"<code>{_e(config)}</code>; overrides: {settings}. Generated {generated} by <code>rwls replay</code>: "
            "the same estimator and detectors as the live service, on the history.</p>"
            f"<h2>Summary</h2>{_summary(result, comparisons)}{''.join(sections)}"
            f'<script type="application/json" id="replay-json">{data_block}</script></body></html>')
