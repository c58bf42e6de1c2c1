"""Offline runs over a CSV history: ``replay`` (the recursive estimator) and ``fit`` (batch closed form).

Both read the file as a :class:`~service.offline.sample_source.SampleSource`, chosen by its header:
the wide layout (one sample per row, :class:`~service.offline.sample_source.WideSamples`) or the
long one historians export (one tag update per row, ``time``, ``tag``, ``value``; the service's tag
path forms the samples, :class:`~service.offline.tag_feed.TagSamples`). Every sample goes through
the same :class:`estimator.channels.channel_bank.ChannelBank` the live service uses, so they accept
exactly the same samples with exactly the same weights.
``fit`` then solves the weighted least squares problem in closed form
(:func:`estimator.recursive.batch.fit_wls`) on the applied samples, forgetting included.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from estimator import ChannelBank, NotIdentifiable, fit_wls
from service.alarms.what_if import WhatIf
from service.config.settings import RwlsConfig
from service.engine.channel_report import ChannelReport, channel_report, finite_or_null
from service.offline.csv_source import CsvError, CsvFile
from service.offline.long_csv import LongCsvSource, is_long_header
from service.offline.progress import Progress
from service.offline.sample_source import RowProblem, SampleSource, WideSamples
from service.offline.tag_feed import CHUNK_ROWS, TagSamples
from service.offline.trace import ReplayTrace
from service.tags.tag_path import tag_path_of

__all__ = ["RunResult", "apply_history", "fit_file", "replay_file"]

MAX_LISTED_ROWS = 1000   # bad rows and rejections listed with line numbers; all are counted


@dataclass
class RunResult:
    """What a replay or fit produced: per-channel reports and the rows that were refused.

    ``layout`` is ``wide`` (a sample per row) or ``long`` (a tag update per row); the tag counts
    are the long layout's (zero for the wide): samples not formed per channel and
    :class:`~service.tags.assembler.FormingRefusal` reason (no bad rows: the updates were fine),
    updates of tags no channel names, and updates not later than their tag's newest.
    """

    channels: dict[str, ChannelReport]
    rows: int = 0
    bad_rows: int = 0
    listed_problems: list[dict[str, object]] = field(default_factory=list)   # the first MAX_LISTED_ROWS
    problems_by_reason: dict[str, int] = field(default_factory=dict)         # every problem, counted
    layout: str = "wide"
    samples_not_formed: dict[str, dict[str, int]] = field(default_factory=dict)
    tag_updates_unused: int = 0
    tag_updates_not_newer: int = 0

    def to_json(self) -> dict[str, object]:
        """The ``--json`` document (NaN and inf become null)."""
        return finite_or_null({
            "channels": self.channels,
            "layout": self.layout,
            "rows": self.rows,
            "bad_rows": self.bad_rows,
            "problems_by_reason": dict(sorted(self.problems_by_reason.items())),
            "problems": self.listed_problems,
            "problems_listed": len(self.listed_problems),
            "problems_list_limit": MAX_LISTED_ROWS,
            "samples_not_formed": {cid: dict(counts) for cid, counts in self.samples_not_formed.items()},
            "tag_updates_unused": self.tag_updates_unused,
            "tag_updates_not_newer": self.tag_updates_not_newer,
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


def _open(data: str | Path, config: RwlsConfig, bank: ChannelBank, chunk_rows: int) -> SampleSource:
    """The file's samples: the long layout through the configuration's tag path, else the wide one."""
    if not is_long_header(CsvFile(data).header()):
        return WideSamples(data, {cid: bank.settings(cid).input_names for cid in bank.channel_ids})
    tags = tag_path_of(config)
    if tags is None or not tags.channel_ids:
        raise CsvError(f"{data}: a long CSV (time, tag, value: one tag update per row) needs channels assembled "
                       "from tags ([channels.<id>.tags]); the configuration has none")
    return TagSamples(LongCsvSource(data), tags, config.tags.formats, chunk_rows)


def apply_history(data: str | Path, config: RwlsConfig, *, label: str = "replay", show_progress: bool | None = False,
                  on_applied: Callable[[str, list[float], float, float], None] | None = None,
                  what_if: WhatIf | None = None, trace: ReplayTrace | None = None,
                  chunk_rows: int = CHUNK_ROWS) -> tuple[ChannelBank, RunResult]:
    """Every sample of a CSV history through a new bank of the configured channels, in line order.

    Parameters
    ----------
    data : the CSV file, wide or long layout (told apart by the header)
    config : the channels (with their baselines) and, for the long layout, the tags
    label : what the progress bar says
    on_applied : called ``(channel, regressor, y, weight)`` after each applied sample
    what_if, trace : observe the bank after each applied sample (alarms, the report's trajectories)
    chunk_rows : long layout: rows per batch of tag updates (the result does not depend on it)

    Returns
    -------
    The bank as the history left it, and the run's counts and problems (channel reports not filled in).

    Raises
    ------
    service.offline.csv_source.CsvError
        The file cannot be used at all (bad rows never raise).
    service.config.settings.ConfigError
        A long file, and the configuration's tags are unusable.
    """
    bank = ChannelBank(config.channel_settings())
    config.apply_baselines(bank)
    if what_if is not None:
        what_if.start(bank)
    source = _open(data, config, bank, chunk_rows)
    result = RunResult(channels={}, layout="wide" if isinstance(source, WideSamples) else "long")
    progress = Progress(source.total_chars, label, enabled=show_progress)
    shown = 0
    for item in source:
        if source.rows - shown >= 512:
            shown = source.rows
            progress.update(source.progress_chars, shown)
        if isinstance(item, RowProblem):
            result.bad_rows += 1
            _note(result, item.line, item.channel, item.reason, item.detail)
            continue
        sample = item.sample
        cid = sample.channel
        outcome = bank.apply_one(sample)
        if outcome.status == "refused":
            _note(result, item.line, cid, outcome.reason)
        elif outcome.status == "applied":
            if on_applied is not None and outcome.regressor is not None:
                on_applied(cid, outcome.regressor, sample.y, outcome.weight)
            if what_if is not None:
                what_if.observe(bank, cid, sample.t)
            if trace is not None and outcome.regressor is not None:
                trace.row(cid, outcome.regressor, sample.y, outcome.weight)
                trace.observe(bank, cid, sample.t)
    progress.close()
    result.rows = source.rows
    if isinstance(source, TagSamples):
        result.samples_not_formed = source.not_formed
        result.tag_updates_unused = source.updates_unused
        result.tag_updates_not_newer = source.updates_not_newer
    return bank, result


def replay_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None,
                trace: ReplayTrace | None = None, chunk_rows: int = CHUNK_ROWS) -> RunResult:
    """Run a CSV history (wide or long layout) through the recursive estimator of every configured channel.

    With ``trace``, each channel's trajectory and applied rows are recorded there (the report's data).

    Raises
    ------
    service.offline.csv_source.CsvError
        The file cannot be used at all (bad rows never raise).
    service.config.settings.ConfigError
        A long file, and the configuration's tags are unusable.
    """
    what_if = WhatIf(config)
    bank, result = apply_history(data, config, label="replay", show_progress=show_progress, what_if=what_if,
                                 trace=trace, chunk_rows=chunk_rows)
    for cid, view in bank.view().items():
        result.channels[cid] = {**channel_report(view), "alarms": what_if.transitions(cid)}
    return result


def fit_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None,
             chunk_rows: int = CHUNK_ROWS) -> RunResult:
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

    bank, result = apply_history(data, config, label="fit", show_progress=show_progress, on_applied=collect,
                                 chunk_rows=chunk_rows)
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
