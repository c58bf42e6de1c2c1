"""Plain-text rendering of a replay or fit result for people at a terminal."""

from __future__ import annotations

import math
from collections import Counter
from datetime import UTC, datetime

from service.replay import RunResult

__all__ = ["render_text"]


def _num(value: object, digits: int = 6) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return f"{value:.{digits}g}"


def _when(item: dict[str, object]) -> str:
    if "t" in item and isinstance(item["t"], float):
        return datetime.fromtimestamp(item["t"], tz=UTC).strftime("%Y-%m-%d %H:%M")
    return f"sample {item.get('sample')}"


def _alarm_lines(ch: dict[str, object]) -> list[str]:
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
            lines.append(f"  alarm {item['kind']:<11} {item['state']:<31} {_when(item)}   "
                         f"statistic {_num(item['statistic'], 4)} limit {_num(item['limit'], 4)}")
    return lines


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
        width = max(12, *(len(t) for t in ch["terms"]))  # type: ignore[union-attr]
        out.append(f"  {'term':<{width}}  {'estimate':>14}  {'std error':>12}  95% interval")
        for term in ch["terms"]:  # type: ignore[union-attr]
            low, high = ch["intervals_95"][term]  # type: ignore[index]
            out.append(f"  {term:<{width}}  {_num(ch['parameters'][term], 10):>14}  "  # type: ignore[index]
                       f"{_num(ch['std_errors'][term], 4):>12}  [{_num(low)}, {_num(high)}]")  # type: ignore[index]
        out.append(f"  residual sd {_num(ch['residual_sd'])}   noise sigma {_num(ch['noise_sigma'])}   "
                   f"effective samples {_num(ch['effective_count'])}   "
                   f"information condition {_num(ch['information_condition'], 3)}")
        if ch["rejections"]:
            reasons = ", ".join(f"{r} {n}" for r, n in ch["rejections"].items())  # type: ignore[union-attr]
            out.append(f"  rejected by reason: {reasons}")
        out += _alarm_lines(ch)
        out.append("")
    if result.bad_rows or result.listed_problems:
        reasons = Counter(str(p["reason"]) for p in result.listed_problems)
        out.append(f"{result.rows} rows read, {result.bad_rows} unreadable; problems by reason: "
                   + ", ".join(f"{r} {n}" for r, n in sorted(reasons.items())))
        for problem in result.listed_problems[:20]:
            where = f" channel {problem['channel']}" if "channel" in problem else ""
            detail = f": {problem['detail']}" if "detail" in problem else ""
            out.append(f"  line {problem['line']}{where}: {problem['reason']}{detail}")
        if len(result.listed_problems) > 20:
            out.append(f"  ... {len(result.listed_problems) - 20} more (see --json)")
    else:
        out.append(f"{result.rows} rows read, none refused")
    return "\n".join(out) + "\n"
