"""Offline runs over a CSV history: ``replay`` (the recursive estimator) and ``fit`` (batch closed form).

Both read the file through :class:`service.csvdata.CsvSource`, route rows to
channels, and pass every row through the same :class:`estimator.channel.ChannelPipeline`
checks, so they accept exactly the same samples with exactly the same weights.
``fit`` then solves the weighted least squares problem in closed form
(:func:`estimator.batch.fit_wls`) on the applied samples, forgetting included.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from estimator.batch import NotIdentifiable, fit_wls
from estimator.channel import ChannelPipeline
from estimator.statistics import bank_statistics, student_t_quantile
from service.config import RwlsConfig
from service.csvdata import BadRow, CsvSource
from service.progress import Progress

__all__ = ["RunResult", "fit_file", "replay_file"]

MAX_LISTED_ROWS = 1000   # bad rows and rejections listed with line numbers; all are counted
INTERVAL_LEVEL = 0.95


@dataclass
class RunResult:
    """What a replay or fit produced: per-channel reports and the rows that were refused."""

    channels: dict[str, dict[str, object]]
    rows: int = 0
    bad_rows: int = 0
    listed_problems: list[dict[str, object]] = field(default_factory=list)

    def to_json(self) -> dict[str, object]:
        """The ``--json`` document (NaN and inf become null)."""
        return _finite_or_null({
            "channels": self.channels,
            "rows": self.rows,
            "bad_rows": self.bad_rows,
            "problems": self.listed_problems,
        })


def _finite_or_null(value: object) -> object:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite_or_null(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite_or_null(v) for v in value]
    return value


def _note(result: RunResult, line: int, channel: str | None, reason: str, detail: str = "") -> None:
    if len(result.listed_problems) < MAX_LISTED_ROWS:
        entry: dict[str, object] = {"line": line, "reason": reason}
        if channel is not None:
            entry["channel"] = channel
        if detail:
            entry["detail"] = detail
        result.listed_problems.append(entry)


def _run(data: str | Path, config: RwlsConfig, label: str, show_progress: bool | None,
         on_applied: Callable[[str, list[float], float, float], None] | None = None
         ) -> tuple[dict[str, ChannelPipeline], RunResult]:
    pipelines = {cid: ChannelPipeline(ch.settings()) for cid, ch in config.channels.items()}
    inputs = {name for p in pipelines.values() for name in p.settings.input_names}
    only = next(iter(pipelines)) if len(pipelines) == 1 else None
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
        pipeline = pipelines.get(cid) if cid is not None else None
        if pipeline is None:
            result.bad_rows += 1
            _note(result, row.line, cid, "unknown_channel")
            continue
        outcome = pipeline.apply(row.inputs, row.y, t=row.t, sigma=row.sigma, weight=row.weight)
        if outcome.status == "rejected":
            _note(result, row.line, cid, outcome.reason)
        elif outcome.status == "applied" and on_applied is not None and outcome.regressor is not None:
            on_applied(cid, outcome.regressor, row.y, outcome.weight)
    progress.close()
    return pipelines, result


def _report(pipeline: ChannelPipeline, theta: np.ndarray, cov: np.ndarray, residual_sd: float,
            effective_count: float, min_information: float, condition: float) -> dict[str, object]:
    names = pipeline.spec.names
    std = np.sqrt(np.clip(np.diagonal(cov), 0.0, None)) if np.all(np.isfinite(cov)) else np.full(len(names), np.nan)
    dof = effective_count - len(names)
    t_q = student_t_quantile(0.5 + INTERVAL_LEVEL / 2, dof) if dof >= 1 else math.nan
    counters = pipeline.counters
    return {
        "terms": names,
        "parameters": {n: float(v) for n, v in zip(names, theta, strict=True)},
        "std_errors": {n: float(v) for n, v in zip(names, std, strict=True)},
        "intervals_95": {n: [float(v - t_q * s), float(v + t_q * s)]
                         for n, v, s in zip(names, theta, std, strict=True)},
        "covariance": cov.tolist(),
        "residual_sd": float(residual_sd),
        "noise_sigma": pipeline.noise_sigma,
        "samples": counters.applied,
        "rejected": sum(counters.rejected.values()),
        "rejections": dict(sorted(counters.rejected.items())),
        "warmup": counters.warmup,
        "forgetting_factor": pipeline.settings.forgetting_factor,
        "weighting": pipeline.settings.weighting,
        "covariance_scale": pipeline.settings.covariance_scale,
        "effective_count": float(effective_count),
        "min_information": float(min_information),
        "information_condition": float(condition),
    }


def replay_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None) -> RunResult:
    """Run a CSV history through the recursive estimator of every configured channel.

    Raises
    ------
    service.csvdata.CsvError
        The file cannot be used at all (bad rows never raise).
    """
    pipelines, result = _run(data, config, "replay", show_progress)
    for cid, pipeline in pipelines.items():
        estimator = pipeline.estimator
        stats = bank_statistics(estimator.factor()[None], [estimator.effective_count],
                                scale=pipeline.settings.covariance_scale)
        result.channels[cid] = _report(
            pipeline, stats.parameters[0], stats.covariance[0], float(stats.residual_sd[0]),
            float(stats.effective_count[0]), float(stats.min_information[0]),
            float(stats.information_condition[0]))
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

    pipelines, result = _run(data, config, "fit", show_progress, on_applied=collect)
    for cid, pipeline in pipelines.items():
        Z, ys, ws = rows[cid]
        n = pipeline.spec.n_params
        lam = pipeline.settings.forgetting_factor
        Zarr = np.array(Z, dtype=np.float64).reshape(-1, n)
        try:
            fit = fit_wls(Zarr, np.array(ys), np.array(ws), lam)
        except NotIdentifiable as exc:
            nan = np.full(n, np.nan)
            report = _report(pipeline, nan, np.full((n, n), np.nan), math.nan, float(len(ys)), 0.0, math.inf)
            report["error"] = f"not identifiable: {exc}"
            result.channels[cid] = report
            continue
        dof = fit.effective_count - n
        residual_var = fit.residual_ss / dof if dof > 0 else math.nan
        cov = fit.unscaled_covariance * (residual_var if pipeline.settings.covariance_scale == "estimated" else 1.0)
        # Eigenvalues of the information Z^T W Z from the singular values of sqrt(W) Z.
        singular = np.linalg.svd(Zarr * np.sqrt(fit.weights)[:, None], compute_uv=False)
        report = _report(pipeline, fit.parameters, cov, math.sqrt(residual_var), fit.effective_count,
                         float(singular[-1] ** 2), float((singular[0] / singular[-1]) ** 2))
        report["noise_sigma"] = None   # the batch fit tracks no noise; see residual_sd
        result.channels[cid] = report
    return result
