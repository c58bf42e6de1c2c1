"""The commissioning report's plots: PNG bytes drawn by matplotlib (Agg, no display), one figure each.

The look follows the dashboard: Okabe-Ito colours, limits dashed, baselines dotted, alarm onsets solid with a
triangle at the top, so that a plot printed in grey still reads.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence

import matplotlib

matplotlib.use("Agg")                    # before pyplot: files only, never a window

import matplotlib.dates as mdates
import matplotlib.pyplot as plt
import numpy as np

from service.offline.trace import ChannelTrace

__all__ = ["detector_plot", "parameter_plot", "residual_plot", "sigma_plot"]

BLUE, SKY, VERMILLION, GREEN, PURPLE = "#0072b2", "#56b4e9", "#d55e00", "#009e73", "#cc79a7"
SIZE = (7.5, 2.6)


EPOCH_LIKE = 1e8                         # larger sample "times" are epoch seconds (after 1973): dates on the axis


def _dated(trace: ChannelTrace) -> bool:
    return bool(trace.t) and min(trace.t) > EPOCH_LIKE


def _x(values: Sequence[float], dated: bool) -> np.ndarray:
    t = np.asarray(values, dtype=float)
    return (t * 1000.0).astype("datetime64[ms]") if dated else t


def _times(trace: ChannelTrace) -> np.ndarray:
    return _x(trace.t, _dated(trace))


def _figure(title: str) -> tuple[plt.Figure, plt.Axes]:
    figure, axes = plt.subplots(figsize=SIZE, dpi=100)
    figure.subplots_adjust(left=0.09, right=0.99, top=0.88, bottom=0.14)    # fixed: a layout engine costs 3x
    axes.set_title(title, loc="left", fontsize=10)
    axes.grid(True, color="#e0e0e0", linewidth=0.6)
    axes.tick_params(labelsize=8)
    return figure, axes


def _png(figure: plt.Figure, axes: plt.Axes, alarms: Sequence[float], dated: bool) -> bytes:
    if dated:
        locator = mdates.AutoDateLocator(maxticks=8)
        axes.xaxis.set_major_locator(locator)
        axes.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    for k, t in enumerate(_x(alarms, dated)):
        # Solid, thin, with a triangle at the top: never mistaken for a dashed limit, in grey too.
        axes.axvline(t, color=PURPLE, linestyle="-", linewidth=0.9, alpha=0.8)
        axes.plot([t], [1.0], marker="v", markersize=7, color=PURPLE, transform=axes.get_xaxis_transform(),
                  clip_on=False, linestyle="none", label="alarm raised" if k == 0 else None)
    axes.legend(fontsize=7, loc="upper left", frameon=False, ncols=4)
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png")
    plt.close(figure)
    return buffer.getvalue()


def parameter_plot(trace: ChannelTrace, j: int, term: str, baseline: float | None, alarms: Sequence[float]) -> bytes:
    t = _times(trace)
    value = np.array([p[j] for p in trace.parameters], dtype=float)
    se = np.array([s[j] for s in trace.std_errors], dtype=float)
    figure, axes = _figure(f"parameter {term}: estimate with \u00b1 2 standard errors")
    axes.fill_between(t, value - 2 * se, value + 2 * se, color=SKY, alpha=0.45, linewidth=0, label="\u00b1 2 s.e.")
    axes.plot(t, value, color=BLUE, linewidth=1.6, label="estimate")
    if baseline is not None and math.isfinite(baseline):
        axes.axhline(baseline, color=GREEN, linestyle=":", linewidth=1.6, label="baseline")
    finite = value[np.isfinite(value)]
    if finite.size:                      # the diffuse start's wide band would hide the rest
        spread = np.nanpercentile(np.abs(finite - finite[-1]), 98) * 3 + 3 * np.nanmedian(se[np.isfinite(se)])
        if math.isfinite(spread) and spread > 0:
            axes.set_ylim(finite[-1] - spread, finite[-1] + spread)
    return _png(figure, axes, alarms, _dated(trace))


def sigma_plot(trace: ChannelTrace, baseline: float | None, alarms: Sequence[float]) -> bytes:
    t = _times(trace)
    figure, axes = _figure("noise sigma against its limit")
    axes.plot(t, trace.noise_sigma, color=BLUE, linewidth=1.6, label="noise sigma (tracked)")
    axes.plot(t, trace.limits["noise_level"], color=VERMILLION, linestyle="--", linewidth=1.4, label="limit")
    if baseline is not None and math.isfinite(baseline):
        axes.axhline(baseline, color=GREEN, linestyle=":", linewidth=1.6, label="baseline sigma")
    return _png(figure, axes, alarms, _dated(trace))


def detector_plot(trace: ChannelTrace, kind: str, alarms: Sequence[float]) -> bytes:
    t = _times(trace)
    figure, axes = _figure(f"{kind} statistic against its threshold")
    axes.plot(t, trace.statistics[kind], color=BLUE, linewidth=1.4, label="statistic")
    axes.plot(t, trace.limits[kind], color=VERMILLION, linestyle="--", linewidth=1.4, label="threshold")
    return _png(figure, axes, alarms, _dated(trace))


def residual_plot(trace: ChannelTrace, alarms: Sequence[float]) -> bytes:
    t = _times(trace)
    spread = 2 * np.asarray(trace.spread, dtype=float)
    figure, axes = _figure("innovations (prediction errors) with \u00b1 2 predicted standard deviations")
    axes.fill_between(t, -spread, spread, color=SKY, alpha=0.45, linewidth=0, label="\u00b1 2 predicted s.d.")
    axes.plot(t, trace.innovation, linestyle="none", marker=".", markersize=2.5, color=BLUE, label="innovation")
    return _png(figure, axes, alarms, _dated(trace))
