"""Plain-text rendering of a replay or fit result for people at a terminal."""

from __future__ import annotations

import math
from datetime import UTC, datetime

from service.engine.channel_report import ChannelReport
from service.offline.replay import RunResult

__all__ = ["SHOWN_PROBLEMS", "render_sweep", "render_text"]

SHOWN_PROBLEMS = 20       # problem lines in the text output; --json lists more, the counts are of all


def _num(value: object, digits: int = 6) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return f"{value:.{digits}g}"


def _when(item: dict[str, object]) -> str:
    if "t" in item and isinstance(item["t"], float):
        return datetime.fromtimestamp(item["t"], tz=UTC).strftime("%Y-%m-%d %H:%M")
    return f"sample {item.get('sample')}"


def _alarm_lines(ch: ChannelReport) -> list[str]:
    """The baseline and the alarm transitions the detectors would have produced (replay only)."""
    lines = []
    baseline = ch.get("baseline")
    if isinstance(baseline, dict):
        lines.append(f"  baseline v{baseline['version']} ({baseline['source']}, {baseline['samples']} samples), "
                     f"noise sigma {_num(baseline['noise_sigma'])}")
    alarms = ch.get("alarms")
    if isinstance(alarms, list):
        if not alarms:
            lines.append("  alarms: none")
        for item in alarms:
            reason = f"   ({item['reason']})" if item.get("reason") else ""      # a design suppression's
            lines.append(f"  alarm {item['kind']:<11} {item['state']:<31} {_when(item)}   "
                         f"statistic {_num(item['statistic'], 4)} limit {_num(item['limit'], 4)}{reason}")
    return lines


def _residual_text(ch: ChannelReport) -> str:
    """The residual sd, saying which: in units of y (unit weights), or of the weighted residuals."""
    if ch.get("residual_sd_scale") == "weighted":
        return (f"weighted residual sd {_num(ch['residual_sd'])} (of residual x sqrt(weight), no unit; "
                f"about 1 when the weights are 1/sigma^2)")
    return f"residual sd {_num(ch['residual_sd'])} (units of y)"


def render_text(result: RunResult, command: str) -> str:
    """A readable summary: one table per channel, then the refused rows."""
    out: list[str] = []
    for cid, ch in result.channels.items():
        out.append(
            f"channel {cid}  ({command}; weighting {ch['weighting']}, forgetting factor "
            f"{ch['forgetting_factor']:g}; {ch['samples']} samples, {ch['rejected']} rejected, "
            f"{ch['warmup']} warm-up)")
        if "error" in ch:
            out.append(f"  {ch['error']}")
        width = max(12, *(len(t) for t in ch["terms"]))
        out.append(f"  {'term':<{width}}  {'estimate':>14}  {'std error':>12}  95% interval")
        for term in ch["terms"]:
            low, high = ch["intervals_95"][term] or (None, None)
            out.append(f"  {term:<{width}}  {_num(ch['parameters'][term], 10):>14}  "
                       f"{_num(ch['std_errors'][term], 4):>12}  [{_num(low)}, {_num(high)}]")
        out.append(f"  {_residual_text(ch)}   noise sigma {_num(ch['noise_sigma'])} (units of y"
                   f"{', batch estimate' if command == 'fit' else ', tracked'})")
        out.append(f"  effective samples {_num(ch['effective_count'])}   "
                   f"information condition {_num(ch['information_condition'], 3)}")
        if ch["rejections"]:
            reasons = ", ".join(f"{r} {n}" for r, n in ch["rejections"].items())
            out.append(f"  rejected by reason: {reasons}")
        not_formed = result.samples_not_formed.get(cid)
        if not_formed:
            reasons = ", ".join(f"{r} {n}" for r, n in not_formed.items())
            out.append(f"  samples not formed from tag updates: {reasons}")
        out += _alarm_lines(ch)
        out.append("")
    if result.bad_rows or result.problems_by_reason:
        total = sum(result.problems_by_reason.values())
        out.append(f"{result.rows} rows read, {result.bad_rows} unreadable; {total} problems by reason: "
                   + ", ".join(f"{r} {n}" for r, n in sorted(result.problems_by_reason.items())))
        for problem in result.listed_problems[:SHOWN_PROBLEMS]:
            where = f" channel {problem['channel']}" if "channel" in problem else ""
            detail = f": {problem['detail']}" if "detail" in problem else ""
            out.append(f"  line {problem['line']}{where}: {problem['reason']}{detail}")
        if total > SHOWN_PROBLEMS:
            listed = len(result.listed_problems)
            capped = f" (--json lists the first {listed}; the counts above are of all {total})" \
                if listed < total else " (see --json)"
            out.append(f"  ... {total - min(SHOWN_PROBLEMS, listed)} more not shown here{capped}")
    else:
        out.append(f"{result.rows} rows read, none refused")
    if result.layout == "long" and (result.tag_updates_unused or result.tag_updates_not_newer):
        out.append(f"tag updates: {result.tag_updates_unused} of tags no channel names, "
                   f"{result.tag_updates_not_newer} not later than their tag's newest (not kept)")
    return "\n".join(out) + "\n"


_SHORT = {"forgetting_factor": "lambda"}


def render_sweep(results: list[RunResult], settings: list[dict[str, float]]) -> str:
    """Several settings' replays side by side: per channel, one column per setting.

    Rows: each term's estimate and standard error, the tracked noise sigma (units of y), samples applied
    and rejected, and the alarm conditions raised (``condition_on`` transitions) per kind.
    """
    labels = [" ".join(f"{_SHORT.get(name, name)}={value:g}" for name, value in setting.items()) or "as configured"
              for setting in settings]
    width = max(14, *(len(label) for label in labels))
    out = [f"sweep: {len(results)} settings in one pass over {results[0].rows} rows"]
    for cid, first in results[0].channels.items():
        channels = [r.channels[cid] for r in results]
        rows: list[tuple[str, list[str]]] = []
        for term in first["terms"]:
            rows.append((f"{term}", [_num(ch["parameters"][term], 8) for ch in channels]))
            rows.append(("  std error", [_num(ch["std_errors"][term], 4) for ch in channels]))
        rows.append(("noise sigma (y)", [_num(ch["noise_sigma"]) for ch in channels]))
        rows.append(("samples", [str(ch["samples"]) for ch in channels]))
        rows.append(("rejected", [str(ch["rejected"]) for ch in channels]))
        kinds = sorted({str(a["kind"]) for ch in channels for a in ch.get("alarms", [])
                        if a["action"] == "condition_on"})
        for kind in kinds:
            rows.append((f"{kind} alarms raised", [str(sum(1 for a in ch.get("alarms", [])
                                                          if a["kind"] == kind and a["action"] == "condition_on"))
                                                   for ch in channels]))
        if not kinds:
            rows.append(("alarms raised", ["0"] * len(channels)))
        name_width = max(16, *(len(name) for name, _ in rows))
        out.append("")
        out.append(f"channel {cid}")
        out.append(f"  {'':<{name_width}}  " + "  ".join(f"{label:>{width}}" for label in labels))
        out += [f"  {name:<{name_width}}  " + "  ".join(f"{v:>{width}}" for v in values) for name, values in rows]
    total = sum(results[0].problems_by_reason.values())
    out.append("")
    out.append(f"{results[0].rows} rows read, {results[0].bad_rows} unreadable; problems per setting: "
               + ", ".join(str(sum(r.problems_by_reason.values())) for r in results)
               + (" (--json lists them)" if total else ""))
    return "\n".join(out) + "\n"
