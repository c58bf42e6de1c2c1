"""Offline runs over a CSV history: ``replay`` (the recursive estimator) and ``fit`` (batch closed form).

Both read the file through :class:`service.offline.csv_source.CsvSource`, route rows to
channels, and pass every row through the same :class:`estimator.channels.channel_bank.ChannelBank`
the live service uses, so they accept exactly the same samples with exactly the same weights.
``fit`` then solves the weighted least squares problem in closed form
(:func:`estimator.recursive.batch.fit_wls`) on the applied samples, forgetting included.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from estimator import ChannelBank, NotIdentifiable, Sample, fit_wls
from service.alarms.what_if import WhatIf
from service.config.settings import RwlsConfig
from service.engine.channel_report import ChannelReport, channel_report, finite_or_null
from service.offline.csv_source import BadRow, CsvSource
from service.offline.progress import Progress
from service.offline.trace import ReplayTrace

__all__ = ["RunResult", "fit_file", "replay_file"]

MAX_LISTED_ROWS = 1000   # bad rows and rejections listed with line numbers; all are counted


@dataclass
class RunResult:
    """What a replay or fit produced: per-channel reports and the rows that were refused."""

    channels: dict[str, ChannelReport]
    rows: int = 0
    bad_rows: int = 0
    listed_problems: list[dict[str, object]] = field(default_factory=list)   # the first MAX_LISTED_ROWS
    problems_by_reason: dict[str, int] = field(default_factory=dict)         # every problem, counted

    def to_json(self) -> dict[str, object]:
        """The ``--json`` document (NaN and inf become null)."""
        return finite_or_null({
            "channels": self.channels,
            "rows": self.rows,
            "bad_rows": self.bad_rows,
            "problems_by_reason": dict(sorted(self.problems_by_reason.items())),
            "problems": self.listed_problems,
            "problems_listed": len(self.listed_problems),
            "problems_list_limit": MAX_LISTED_ROWS,
        })


def _note(result: RunResult, line: int, channel: str | None, reason: str, detail: str = "") -> None:
    result.problems_by_reason[reason] = result.problems_by_reason.get(reason, 0) + 1
    if len(result.listed_problems) < MAX_LISTED_ROWS:
        entry: dict[str, object] = {"line": line, "reason": reason}
        if channel is not None:
            entry["channel"] = channel
        if detail:
            entry["detail"] = detail
        result.listed_problems.append(entry)


def _run(data: str | Path, config: RwlsConfig, label: str, show_progress: bool | None,
         on_applied: Callable[[str, list[float], float, float], None] | None = None,
         what_if: WhatIf | None = None, trace: ReplayTrace | None = None) -> tuple[ChannelBank, RunResult]:
    bank = ChannelBank(config.channel_settings())
    config.apply_baselines(bank)
    if what_if is not None:
        what_if.start(bank)
    inputs = {name for cid in bank.channel_ids for name in bank.settings(cid).input_names}
    only = bank.channel_ids[0] if len(bank.channel_ids) == 1 else None
    source = CsvSource(data, inputs, need_channel=only is None)
    result = RunResult(channels={})
    progress = Progress(source.total_chars, label, enabled=show_progress)
    for row in source:
        result.rows += 1
        if result.rows % 512 == 0:
            progress.update(source.progress_chars, result.rows)
        if isinstance(row, BadRow):
            result.bad_rows += 1
            _note(result, row.line, None, row.reason, row.detail)
            continue
        cid = row.channel if only is None else (row.channel or only)
        if cid is None or cid not in bank:
            result.bad_rows += 1
            _note(result, row.line, cid, "unknown_channel")
            continue
        outcome = bank.apply_one(Sample(cid, row.y, row.inputs, row.t, row.sigma, row.weight))
        if outcome.status == "refused":
            _note(result, row.line, cid, outcome.reason)
        elif outcome.status == "applied":
            if on_applied is not None and outcome.regressor is not None:
                on_applied(cid, outcome.regressor, row.y, outcome.weight)
            if what_if is not None:
                what_if.observe(bank, cid, row.t)
            if trace is not None and outcome.regressor is not None:
                trace.row(cid, outcome.regressor, row.y, outcome.weight)
                trace.observe(bank, cid, row.t)
    progress.close()
    return bank, result


def replay_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None,
                trace: ReplayTrace | None = None) -> RunResult:
    """Run a CSV history through the recursive estimator of every configured channel.

    With ``trace``, each channel's trajectory and applied rows are recorded there (the report's data).

    Raises
    ------
    service.offline.csv_source.CsvError
        The file cannot be used at all (bad rows never raise).
    """
    what_if = WhatIf(config)
    bank, result = _run(data, config, "replay", show_progress, what_if=what_if, trace=trace)
    for cid, view in bank.view().items():
        result.channels[cid] = {**channel_report(view), "alarms": what_if.transitions(cid)}
    return result


def fit_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None) -> RunResult:
    """Batch closed-form WLS per channel on the samples replay would apply, with the same weights.

    With ``weighting = "tracked"`` the weights are those the tracker produced
    during the pass (each made before its sample), so the two paths agree.
    """
    rows: dict[str, tuple[list[list[float]], list[float], list[float]]] = {
        cid: ([], [], []) for cid in config.channels}

    def collect(cid: str, z: list[float], y: float, w: float) -> None:
        Z, ys, ws = rows[cid]
        Z.append(z)
        ys.append(y)
        ws.append(w)

    bank, result = _run(data, config, "fit", show_progress, on_applied=collect)
    for cid, view in bank.view().items():
        Z, ys, ws = rows[cid]
        n = len(view.terms)
        scale = view.settings.covariance_scale
        Zarr = np.array(Z, dtype=np.float64).reshape(-1, n)
        try:
            fit = fit_wls(Zarr, np.array(ys), np.array(ws), view.settings.forgetting_factor)
        except NotIdentifiable as exc:
            nan = np.full(n, np.nan)
            failed = replace(view, parameters=nan, std_errors=nan, covariance=np.full((n, n), np.nan),
                             residual_sd=math.nan, dof=math.nan, noise_sigma=math.nan,
                             min_information=0.0, information_condition=math.inf)
            report = channel_report(failed)
            report["error"] = f"not identifiable: {exc}"
            result.channels[cid] = report
            continue
        dof = fit.effective_count - n
        residual_var = fit.residual_ss / dof if dof > 0 else math.nan
        # The batch estimate of the noise sigma in units of y: the unweighted residuals, with the same
        # exponential forgetting as the fit (one sigma for the whole history, whatever the weights were).
        memory = view.settings.forgetting_factor ** np.arange(len(ys) - 1, -1, -1, dtype=np.float64)
        residual = np.array(ys) - Zarr @ fit.parameters
        noise_dof = float(memory.sum()) - n
        noise_sigma = math.sqrt(float(memory @ (residual * residual)) / noise_dof) if noise_dof > 0 else math.nan
        cov = fit.unscaled_covariance * (residual_var if scale == "estimated" else 1.0)
        # Eigenvalues of the information Z^T W Z from the singular values of sqrt(W) Z.
        singular = np.linalg.svd(Zarr * np.sqrt(fit.weights)[:, None], compute_uv=False)
        batch_view = replace(
            view, parameters=fit.parameters, covariance=cov,
            std_errors=np.sqrt(np.clip(np.diagonal(cov), 0.0, None)), residual_sd=math.sqrt(residual_var),
            dof=dof, noise_sigma=noise_sigma,
            effective_count=fit.effective_count, min_information=float(singular[-1] ** 2),
            information_condition=float((singular[0] / singular[-1]) ** 2))
        result.channels[cid] = channel_report(batch_view)
    return result
