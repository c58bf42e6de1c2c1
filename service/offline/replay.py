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
from typing import cast

import numpy as np

from estimator import AppliedRows, ChannelBank, NotIdentifiable, SampleColumns, fit_wls
from service.alarms.what_if import WhatIf
from service.config.settings import RwlsConfig
from service.engine.channel_report import ChannelReport, channel_report, finite_or_null
from service.offline.csv_source import CsvError, CsvFile
from service.offline.long_csv import LongCsvSource, is_long_header
from service.offline.progress import Progress
from service.offline.sample_source import LinedSample, RowProblem, SampleSource, WideSamples
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


RowsCallback = Callable[[str, AppliedRows], None]

SAMPLES_PER_CHUNK = 65_536   # samples applied at once by the columnar path (the result does not depend on it)


def apply_history(data: str | Path, config: RwlsConfig, *, label: str = "replay", show_progress: bool | None = False,
                  on_rows: RowsCallback | None = None, what_if: WhatIf | None = None,
                  trace: ReplayTrace | None = None, chunk_rows: int = CHUNK_ROWS,
                  chunk_samples: int = SAMPLES_PER_CHUNK, exact: bool = False) -> tuple[ChannelBank, RunResult]:
    """Every sample of a CSV history through a new bank of the configured channels, in line order.

    Samples are applied in chunks of ``chunk_samples`` through the bank's columnar path
    (:meth:`~estimator.channels.channel_bank.ChannelBank.apply_columns`: lockstep rounds across channels,
    the exact path's bits), and the alarms of a chunk are taken from the bank's events after it
    (:meth:`~service.alarms.what_if.WhatIf.observe_chunk`). A chunk holding a sample without a time, a run
    with a ``trace`` (it reads the estimates after every sample) and ``exact`` runs take the exact path
    one sample at a time instead. Either way the bank, the counts, the problems (in line order) and the
    alarms are the same.

    Parameters
    ----------
    data : the CSV file, wide or long layout (told apart by the header)
    config : the channels (with their baselines) and, for the long layout, the tags
    label : what the progress bar says
    on_rows : called ``(channel, rows)`` with each chunk's applied samples of a channel, in order
    what_if, trace : observe the bank after applied samples (alarms, the report's trajectories)
    chunk_rows : long layout: rows per batch of tag updates (the result does not depend on it)
    chunk_samples : samples per columnar chunk (the result does not depend on it)
    exact : every sample alone through the exact path (:meth:`ChannelBank.apply_one`), as before the columnar path

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
    if chunk_samples < 1:
        raise ValueError(f"chunk_samples must be at least 1, got {chunk_samples}")
    bank = ChannelBank(config.channel_settings())
    config.apply_baselines(bank)
    if what_if is not None:
        what_if.start(bank)
    source = _open(data, config, bank, chunk_rows)
    result = RunResult(channels={}, layout="wide" if isinstance(source, WideSamples) else "long")
    progress = Progress(source.total_chars, label, enabled=show_progress)
    one_by_one = exact or trace is not None
    chunk: list[LinedSample | RowProblem] = []
    samples = 0
    shown = 0
    for item in source:
        if source.rows - shown >= 512:
            shown = source.rows
            progress.update(source.progress_chars, shown)
        chunk.append(item)
        if isinstance(item, LinedSample):
            samples += 1
            if samples >= chunk_samples or one_by_one:
                _apply_chunk(bank, chunk, result, on_rows, what_if, trace, one_by_one)
                chunk = []
                samples = 0
    _apply_chunk(bank, chunk, result, on_rows, what_if, trace, one_by_one)
    progress.close()
    result.rows = source.rows
    if isinstance(source, TagSamples):
        result.samples_not_formed = source.not_formed
        result.tag_updates_unused = source.updates_unused
        result.tag_updates_not_newer = source.updates_not_newer
    return bank, result


def _apply_chunk(bank: ChannelBank, chunk: list[LinedSample | RowProblem], result: RunResult,
                 on_rows: RowsCallback | None, what_if: WhatIf | None, trace: ReplayTrace | None,
                 one_by_one: bool) -> None:
    """A chunk of the source's items: columnar when every sample has a time, else one sample at a time."""
    if one_by_one or any(isinstance(i, LinedSample) and i.sample.t is None for i in chunk):
        for item in chunk:
            _apply_one(bank, item, result, on_rows, what_if, trace)
        return
    # Each channel's samples as columns, and where each came from in the chunk.
    columns: dict[str, SampleColumns] = {}
    places: dict[str, list[int]] = {}
    for k, item in enumerate(chunk):
        if isinstance(item, LinedSample):
            s = item.sample
            cols = columns.get(s.channel)
            if cols is None:
                cols = columns[s.channel] = SampleColumns()
                places[s.channel] = []
            cols.append(s.y, s.inputs, s.t, s.sigma, s.weight, s.seq)
            places[s.channel].append(k)
    before = {cid: bank.baseline_version(cid) for cid in columns if cid in bank} if what_if is not None else {}
    outcomes = bank.apply_columns(columns, keep_rows=True)
    # Problems in the chunk's order (bad rows and refusals interleaved as the exact path notes them).
    problems: list[tuple[int, int, str | None, str, str]] = [
        (k, item.line, item.channel, item.reason, item.detail)
        for k, item in enumerate(chunk) if isinstance(item, RowProblem)]
    first_applied = len(chunk)
    for cid, outcome in outcomes.items():
        where = places[cid]
        problems.extend((where[pos], cast(LinedSample, chunk[where[pos]]).line, cid, reason, "")
                        for pos, reason in outcome.refused)
        rows = outcome.rows
        if rows is not None and rows.position.shape[0]:
            first_applied = min(first_applied, where[int(rows.position[0])])
            if on_rows is not None:
                on_rows(cid, rows)
    result.bad_rows += sum(1 for item in chunk if isinstance(item, RowProblem))
    for _, line, channel, reason, detail in sorted(problems, key=lambda p: p[0]):
        _note(result, line, channel, reason, detail)
    if what_if is not None and first_applied < len(chunk):
        t = cast(LinedSample, chunk[first_applied]).sample.t
        what_if.observe_chunk(bank, before, float(t) if t is not None else math.nan)


def _apply_one(bank: ChannelBank, item: LinedSample | RowProblem, result: RunResult, on_rows: RowsCallback | None,
               what_if: WhatIf | None, trace: ReplayTrace | None) -> None:
    """One item through the exact path, observed after it if applied."""
    if isinstance(item, RowProblem):
        result.bad_rows += 1
        _note(result, item.line, item.channel, item.reason, item.detail)
        return
    sample = item.sample
    cid = sample.channel
    outcome = bank.apply_one(sample)
    if outcome.status == "refused":
        _note(result, item.line, cid, outcome.reason)
    elif outcome.status == "applied":
        if on_rows is not None and outcome.regressor is not None:
            on_rows(cid, AppliedRows(np.zeros(1, dtype=np.intp), np.array([outcome.regressor], dtype=np.float64),
                                     np.array([sample.y]), np.array([outcome.weight])))
        if what_if is not None:
            what_if.observe(bank, cid, sample.t)
        if trace is not None and outcome.regressor is not None:
            trace.row(cid, outcome.regressor, sample.y, outcome.weight)
            trace.observe(bank, cid, sample.t)


def replay_file(data: str | Path, config: RwlsConfig, show_progress: bool | None = None,
                trace: ReplayTrace | None = None, chunk_rows: int = CHUNK_ROWS,
                chunk_samples: int = SAMPLES_PER_CHUNK, exact: bool = False) -> RunResult:
    """Run a CSV history (wide or long layout) through the recursive estimator of every configured channel.

    With ``trace``, each channel's trajectory and applied rows are recorded there (the report's data).
    ``chunk_samples`` and ``exact`` as :func:`apply_history` takes them (neither changes the result).

    Raises
    ------
    service.offline.csv_source.CsvError
        The file cannot be used at all (bad rows never raise).
    service.config.settings.ConfigError
        A long file, and the configuration's tags are unusable.
    """
    what_if = WhatIf(config)
    bank, result = apply_history(data, config, label="replay", show_progress=show_progress, what_if=what_if,
                                 trace=trace, chunk_rows=chunk_rows, chunk_samples=chunk_samples, exact=exact)
    for cid, view in bank.view().items():
        result.channels[cid] = {**channel_report(view), "alarms": what_if.transitions(cid)}
    return result


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
