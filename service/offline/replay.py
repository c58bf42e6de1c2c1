"""Offline runs over a CSV history: ``replay`` (the recursive estimator), its sweeps, and ``fit`` (batch closed form).

All read the file once, as :func:`~service.offline.history_pass.run_pass` does: the wide layout (one
sample per row) or the long one historians export (one tag update per row; the service's tag path
forms the samples). Every sample goes through the same :class:`estimator.channels.channel_bank.ChannelBank`
the live service uses, so they accept exactly the same samples with exactly the same weights.
A sweep runs several settings of the same channels in that one pass. ``fit`` keeps the applied
samples (regressor rows, outputs, weights used) as arrays during the pass and then solves the weighted
least squares problem in closed form (:func:`estimator.recursive.batch.fit_wls`), forgetting included.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path

import numpy as np

from estimator import AppliedRows, NotIdentifiable, fit_wls
from service.alarms.what_if import WhatIf
from service.config.settings import RwlsConfig
from service.engine.channel_report import channel_report
from service.offline.history_pass import (
    MAX_LISTED_ROWS,
    SAMPLES_PER_CHUNK,
    HistoryPass,
    RunResult,
    apply_history,
    run_pass,
)
from service.offline.tag_feed import CHUNK_ROWS
from service.offline.trace import ReplayTrace

__all__ = ["MAX_LISTED_ROWS", "SAMPLES_PER_CHUNK", "RunResult", "apply_history", "fit_file", "replay_file",
           "sweep_file"]


def _replay_results(done: HistoryPass) -> list[RunResult]:
    """Each setting's result with its channel reports and alarms filled in."""
    results = []
    for k, setting in enumerate(done.settings):
        what_if = setting.what_if
        for cid, view in done.view(k).items():
            setting.result.channels[cid] = {**channel_report(view),
                                            "alarms": what_if.transitions(cid) if what_if is not None else []}
        results.append(setting.result)
    return results


def replay_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None,
                trace: ReplayTrace | None = None, chunk_rows: int = CHUNK_ROWS,
                chunk_samples: int = SAMPLES_PER_CHUNK, exact: bool = False) -> RunResult:
    """Run a CSV history (wide or long layout) through the recursive estimator of every configured channel.

    With ``trace``, each channel's trajectory and applied rows are recorded there (the report's data).
    ``chunk_samples`` and ``exact`` as :func:`~service.offline.history_pass.run_pass` takes them (neither
    changes the result).

    Raises
    ------
    service.offline.csv_source.CsvError
        The file cannot be used at all (bad rows never raise).
    service.config.settings.ConfigError
        A long file, and the configuration's tags are unusable.
    """
    done = run_pass(data, [config], label="replay", show_progress=show_progress, what_ifs=[WhatIf(config)],
                    trace=trace, chunk_rows=chunk_rows, chunk_samples=chunk_samples, exact=exact)
    return _replay_results(done)[0]


def sweep_file(data: str | Path, configs: Sequence[RwlsConfig], show_progress: bool | None = None,
               chunk_rows: int = CHUNK_ROWS, chunk_samples: int = SAMPLES_PER_CHUNK,
               exact: bool = False) -> list[RunResult]:
    """:func:`replay_file` of several settings of the same channels in one pass over the file.

    Each result equals :func:`replay_file` of its configuration alone: the settings' channels share
    one bank (each round of the recursion advances them all at once), each keeping its own counts,
    problems and alarms.
    """
    done = run_pass(data, list(configs), label="sweep", show_progress=show_progress,
                    what_ifs=[WhatIf(c) for c in configs], chunk_rows=chunk_rows, chunk_samples=chunk_samples,
                    exact=exact)
    return _replay_results(done)


def fit_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None,
             chunk_rows: int = CHUNK_ROWS, chunk_samples: int = SAMPLES_PER_CHUNK, exact: bool = False) -> RunResult:
    """Batch closed-form WLS per channel on the samples replay would apply, with the same weights.

    With ``weighting = "tracked"`` the weights are those the tracker produced
    during the pass (each made before its sample), so the two paths agree. One pass over the file: the
    applied samples are kept as arrays (``n_params + 2`` floats each) for the closed form.
    ``chunk_samples`` and ``exact`` as :func:`apply_history` takes them (neither changes the result).
    """
    parts: dict[str, list[AppliedRows]] = {cid: [] for cid in config.channels}

    def collect(cid: str, rows: AppliedRows) -> None:
        parts[cid].append(rows)

    bank, result = apply_history(data, config, label="fit", show_progress=show_progress, on_rows=collect,
                                 chunk_rows=chunk_rows, chunk_samples=chunk_samples, exact=exact)
    for cid, view in bank.view().items():
        n = len(view.terms)
        joined = AppliedRows.join(parts.pop(cid), n)
        Zarr, y_all, w_all = joined.Z, joined.y, joined.w
        scale = view.settings.covariance_scale
        try:
            fit = fit_wls(Zarr, y_all, w_all, view.settings.forgetting_factor)
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
        memory = view.settings.forgetting_factor ** np.arange(y_all.shape[0] - 1, -1, -1, dtype=np.float64)
        residual = y_all - Zarr @ fit.parameters
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
