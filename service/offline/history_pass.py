"""One pass over a CSV history: every sample through a bank of the configured channels, in line order.

The pass reads the file once as a :class:`~service.offline.sample_source.SampleSource` and applies its
samples in chunks through the bank's columnar path
(:meth:`~estimator.channels.channel_bank.ChannelBank.apply_columns`: lockstep rounds across channels, the
exact path's bits), taking the alarms of a chunk from the bank's events after it
(:meth:`~service.alarms.what_if.WhatIf.observe_chunk_events`). A chunk holding a sample without a time,
a run with a trace (it reads the estimates after every sample) and ``exact`` runs go one sample at a
time through the exact path instead. Either way the bank, the counts, the problems (in line order) and
the alarms are the same, whatever the chunk size.

**Several settings in one pass** (a sweep): each setting's channels are copies of the configured ones
in one shared bank (ids ``<channel>\x1f<setting>``), so a round of the recursion advances every
setting's copy of every channel at once, and each setting keeps its own counts, problems and alarms.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import cast

import numpy as np

from estimator import AppliedRows, ChannelBank, ChannelEvent, ChannelView, RegressorSpec, SampleColumns
from service.alarms.what_if import WhatIf
from service.config.settings import RwlsConfig
from service.engine.channel_report import ChannelReport, finite_or_null
from service.offline.csv_source import CsvError, CsvFile
from service.offline.long_csv import LongCsvSource, is_long_header
from service.offline.progress import Progress
from service.offline.sample_source import LinedSample, RowProblem, SampleSource, WideSamples
from service.offline.tag_feed import CHUNK_ROWS, TagSamples
from service.offline.trace import ReplayTrace
from service.tags.tag_path import tag_path_of

__all__ = ["MAX_LISTED_ROWS", "SAMPLES_PER_CHUNK", "HistoryPass", "RowsCallback", "RunResult", "apply_history",
           "run_pass"]

MAX_LISTED_ROWS = 1000   # bad rows and rejections listed with line numbers; all are counted
SAMPLES_PER_CHUNK = 65_536   # samples applied at once by the columnar path (the result does not depend on it)

RowsCallback = Callable[[str, AppliedRows], None]


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




def _open(data: str | Path, config: RwlsConfig, chunk_rows: int) -> SampleSource:
    """The file's samples: the long layout through the configuration's tag path, else the wide one."""
    if not is_long_header(CsvFile(data).header()):
        return WideSamples(data, {cid: s.input_names for cid, s in config.channel_settings().items()})
    tags = tag_path_of(config)
    if tags is None or not tags.channel_ids:
        raise CsvError(f"{data}: a long CSV (time, tag, value: one tag update per row) needs channels assembled "
                       "from tags ([channels.<id>.tags]); the configuration has none")
    return TagSamples(LongCsvSource(data), tags, config.tags.formats, chunk_rows)


@dataclass
class _Setting:
    """One setting of a pass: its configuration, its channels' ids in the shared bank, its result and alarms."""

    config: RwlsConfig
    index: int
    single: bool
    result: RunResult
    what_if: WhatIf | None

    def bank_id(self, channel: str) -> str:
        return channel if self.single else f"{channel}\x1f{self.index}"


@dataclass
class HistoryPass:
    """What a pass leaves: the shared bank, and per setting its result and alarms (``what_if``)."""

    bank: ChannelBank
    settings: list[_Setting] = field(default_factory=list)

    def view(self, index: int) -> dict[str, ChannelView]:
        """Setting ``index``'s channels' views, by configured channel id."""
        setting = self.settings[index]
        ids = {setting.bank_id(cid): cid for cid in setting.config.channels}
        return {ids[bid]: v for bid, v in self.bank.view(list(ids)).items()}


def _bank_of(settings: list[_Setting]) -> ChannelBank:
    """One bank holding every setting's channels, each with its configured baseline in force."""
    if len(settings) == 1:
        bank = ChannelBank(settings[0].config.channel_settings())
        settings[0].config.apply_baselines(bank)
        return bank
    bank = ChannelBank({s.bank_id(cid): channel for s in settings
                        for cid, channel in s.config.channel_settings().items()})
    for s in settings:
        for cid, channel in s.config.channels.items():
            baseline = channel.baseline
            if baseline is not None:
                values, covariance = baseline.values(RegressorSpec(channel.terms).names)
                bank.set_baseline(s.bank_id(cid), values, noise_sigma=baseline.noise_sigma, covariance=covariance,
                                  source=baseline.source, note="from the configuration")
    return bank


def run_pass(data: str | Path, configs: Sequence[RwlsConfig], *, label: str = "replay",
             show_progress: bool | None = False, on_rows: RowsCallback | None = None,
             what_ifs: Sequence[WhatIf] | None = None,
             trace: ReplayTrace | None = None, chunk_rows: int = CHUNK_ROWS,
             chunk_samples: int = SAMPLES_PER_CHUNK, exact: bool = False) -> HistoryPass:
    """Every sample of a CSV history through every setting's channels, in one pass over the file.

    Parameters
    ----------
    data : the CSV file, wide or long layout (told apart by the header)
    configs : one configuration per setting, all of the same channels (the first's tags read a long file)
    label : what the progress bar says
    on_rows : called ``(channel, rows)`` with each chunk's applied samples of a channel, in order (one setting)
    what_ifs : one per setting (made of its configuration): its alarm transitions are collected there
    trace : the report's trajectories and rows (one setting; the exact path)
    chunk_rows : long layout: rows per batch of tag updates (the result does not depend on it)
    chunk_samples : samples per columnar chunk (the result does not depend on it)
    exact : every sample alone through the exact path (:meth:`ChannelBank.apply_one`)

    Raises
    ------
    service.offline.csv_source.CsvError
        The file cannot be used at all (bad rows never raise).
    service.config.settings.ConfigError
        A long file, and the configuration's tags are unusable.
    """
    if chunk_samples < 1:
        raise ValueError(f"chunk_samples must be at least 1, got {chunk_samples}")
    if not configs:
        raise ValueError("configs must hold at least one setting")
    if len(configs) > 1 and (on_rows is not None or trace is not None):
        raise ValueError("on_rows and trace take one setting")
    if what_ifs is not None and len(what_ifs) != len(configs):
        raise ValueError(f"what_ifs must hold one per setting, got {len(what_ifs)} for {len(configs)}")
    settings = [_Setting(c, k, len(configs) == 1, RunResult(channels={}),
                         what_ifs[k] if what_ifs is not None else None) for k, c in enumerate(configs)]
    bank = _bank_of(settings)
    if what_ifs is not None:
        bank.take_events()
        for s in settings:
            cast(WhatIf, s.what_if).start_held(
                {cid: bank.baseline_version(s.bank_id(cid)) is not None for cid in s.config.channels})
    source = _open(data, configs[0], chunk_rows)
    layout = "wide" if isinstance(source, WideSamples) else "long"
    progress = Progress(source.total_chars, label, enabled=show_progress)
    run = _Chunks(bank, settings, on_rows, trace, exact or trace is not None)
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
            if samples >= chunk_samples or run.one_by_one:
                run.apply(chunk)
                chunk = []
                samples = 0
    run.apply(chunk)
    progress.close()
    for s in settings:
        result = s.result
        result.layout = layout
        result.rows = source.rows
        if isinstance(source, TagSamples):
            result.samples_not_formed = source.not_formed
            result.tag_updates_unused = source.updates_unused
            result.tag_updates_not_newer = source.updates_not_newer
    return HistoryPass(bank, settings)


def apply_history(data: str | Path, config: RwlsConfig, *, label: str = "replay", show_progress: bool | None = False,
                  on_rows: RowsCallback | None = None, what_if: WhatIf | None = None,
                  trace: ReplayTrace | None = None, chunk_rows: int = CHUNK_ROWS,
                  chunk_samples: int = SAMPLES_PER_CHUNK, exact: bool = False) -> tuple[ChannelBank, RunResult]:
    """:func:`run_pass` of one setting: the bank as the history left it, and the run's counts and problems
    (channel reports not filled in); with ``what_if``, the alarms are collected there."""
    done = run_pass(data, [config], label=label, show_progress=show_progress, on_rows=on_rows,
                    what_ifs=None if what_if is None else [what_if], trace=trace, chunk_rows=chunk_rows,
                    chunk_samples=chunk_samples, exact=exact)
    return done.bank, done.settings[0].result


class _Chunks:
    """Applies chunks of the source's items to every setting's channels."""

    def __init__(self, bank: ChannelBank, settings: list[_Setting], on_rows: RowsCallback | None,
                 trace: ReplayTrace | None, one_by_one: bool) -> None:
        self.bank = bank
        self.settings = settings
        self.on_rows = on_rows
        self.trace = trace
        self.one_by_one = one_by_one
        self.alarms = settings[0].what_if is not None
        # bank id -> (setting, channel id), to hand each setting its own events under its channels' ids
        self.owner = {s.bank_id(cid): (s, cid) for s in settings for cid in s.config.channels}

    def apply(self, chunk: list[LinedSample | RowProblem]) -> None:
        """A chunk: columnar when every sample has a time, else one sample at a time."""
        if not chunk:
            return
        if self.one_by_one or any(isinstance(i, LinedSample) and i.sample.t is None for i in chunk):
            for item in chunk:
                self._one(item)
            return
        columns: dict[str, SampleColumns] = {}
        places: dict[str, list[int]] = {}
        for k, item in enumerate(chunk):
            if isinstance(item, LinedSample):
                sample = item.sample
                cols = columns.get(sample.channel)
                if cols is None:
                    cols = columns[sample.channel] = SampleColumns()
                    places[sample.channel] = []
                cols.append(sample.y, sample.inputs, sample.t, sample.sigma, sample.weight, sample.seq)
                places[sample.channel].append(k)
        bank = self.bank
        shared = {s.bank_id(cid): cols for s in self.settings for cid, cols in columns.items()}   # read only
        before = {bid: bank.baseline_version(bid) for bid in shared if bid in bank} if self.alarms else {}
        outcomes = bank.apply_columns(shared, keep_rows=True)
        events = self._events_by_setting(bank.take_events()) if self.alarms else {}
        bad = [(k, item) for k, item in enumerate(chunk) if isinstance(item, RowProblem)]
        for s in self.settings:
            # Problems in the chunk's order (bad rows and refusals interleaved as the exact path notes them).
            problems = [(k, item.line, item.channel, item.reason, item.detail) for k, item in bad]
            first_applied = len(chunk)
            for cid in columns:
                outcome = outcomes[s.bank_id(cid)]
                where = places[cid]
                problems.extend((where[pos], cast(LinedSample, chunk[where[pos]]).line, cid, reason, "")
                                for pos, reason in outcome.refused)
                rows = outcome.rows
                if rows is not None and rows.position.shape[0]:
                    first_applied = min(first_applied, where[int(rows.position[0])])
                    if self.on_rows is not None:
                        self.on_rows(cid, rows)
            result = s.result
            result.bad_rows += len(bad)
            for _, line, channel, reason, detail in sorted(problems, key=lambda p: p[0]):
                _note(result, line, channel, reason, detail)
            if s.what_if is not None and first_applied < len(chunk):
                t = cast(LinedSample, chunk[first_applied]).sample.t
                versions = {cid: before.get(s.bank_id(cid)) for cid in s.config.channels}
                s.what_if.observe_chunk_events(events.get(s.index, []), versions,
                                               float(t) if t is not None else math.nan)

    def _events_by_setting(self, events: list[ChannelEvent]) -> dict[int, list[ChannelEvent]]:
        """The bank's events split by setting (order kept), each under its configured channel id."""
        split: dict[int, list[ChannelEvent]] = {}
        single = len(self.settings) == 1
        for event in events:
            s, cid = self.owner[event.channel]
            split.setdefault(s.index, []).append(event if single else replace(event, channel=cid))
        return split

    def _one(self, item: LinedSample | RowProblem) -> None:
        """One item through the exact path for every setting, observed after it if applied."""
        if isinstance(item, RowProblem):
            for s in self.settings:
                s.result.bad_rows += 1
                _note(s.result, item.line, item.channel, item.reason, item.detail)
            return
        sample = item.sample
        cid = sample.channel
        bank = self.bank
        for s in self.settings:
            bid = s.bank_id(cid)
            outcome = bank.apply_one(sample if s.single else replace(sample, channel=bid))
            if outcome.status == "refused":
                _note(s.result, item.line, cid, outcome.reason)
                continue
            if outcome.status != "applied":
                continue
            if self.on_rows is not None and outcome.regressor is not None:
                self.on_rows(cid, AppliedRows(np.zeros(1, dtype=np.intp),
                                              np.array([outcome.regressor], dtype=np.float64),
                                              np.array([sample.y]), np.array([outcome.weight])))
            if s.what_if is not None:
                events = self._events_by_setting(bank.take_events()).get(s.index, [])
                s.what_if.observe_events(cid, sample.t, events,
                                         {e.channel: bank.baseline_version(s.bank_id(e.channel)) for e in events})
            if self.trace is not None and outcome.regressor is not None:
                self.trace.row(cid, outcome.regressor, sample.y, outcome.weight)
                self.trace.observe(bank, cid, sample.t)
