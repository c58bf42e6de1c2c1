"""All channels of a plant: samples in, estimates out, vectorised across channels.

Channels whose estimators have the same shape (parameter count, noise-tracker
mode, operating-point model size) share one :class:`RecursiveWLSBank`, one
:class:`NoiseVarianceTracker` and one :class:`LogVarianceModel`, each holding
per-channel settings in arrays. :meth:`ChannelBank.apply` takes a micro-batch of
samples, keeps each channel's samples in arrival order, and works in rounds:
round r holds the r-th sample of every channel that has one, so a round
touches each channel at most once and is one vectorised step per group.

For each sample of a round, in this order (see :mod:`estimator.channels.channel`):
checks, regressor, weight from the tracker state before the sample, the
recursive update, the tracker and operating-point model, the lag buffers.
A group with fewer than ``tuning.vector_min`` samples in a round takes the scalar
paths, which produce the same bits as the vectorised ones; the result of a micro-batch
therefore does not depend on how samples were split into batches, and
``rwls replay`` (one sample at a time) equals the live service.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel import ChannelSettings, PathTuning, Prepared, Sample, SampleOutcome
from estimator.channels.channel_group import ChannelGroup, GroupState, Lane, shape_key
from estimator.channels.channel_view import ChannelView, DetectorReading, ViewBlock
from estimator.channels.column_rounds import apply_group_columns
from estimator.channels.group_watch import WatchNotice
from estimator.channels.sample_columns import AppliedRows, ColumnsOutcome, SampleColumns
from estimator.detection.baseline import Baseline
from estimator.detection.detectors import ConditionEvent
from estimator.recursive.sample_refusal import SampleRefusal
from estimator.recursive.statistics import bank_statistics

__all__ = ["ChannelBank", "ChannelBankState", "ChannelEvent", "ChannelView", "DetectorReading", "ViewBlock"]

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class ChannelEvent:
    """Something the detectors said about a channel: a condition changed, or a notice (new baseline,
    restart, the drift test's ability to judge)."""

    channel: str
    condition: ConditionEvent | None = None
    notice: WatchNotice | None = None

    @property
    def baseline(self) -> Baseline | None:
        return self.notice.baseline if self.notice is not None else None


@dataclass(frozen=True)
class ChannelBankState:
    """Copy of a :class:`ChannelBank`'s whole state: one :class:`GroupState` per group of channels of one shape.

    Everything the bank learns and holds is in it (settings are the configuration's, events not yet
    taken are not state); :mod:`estimator.channels.bank_state` writes it as arrays and JSON.
    """

    groups: tuple[GroupState, ...]


def _time_key(event: ChannelEvent) -> float:
    t = event.condition.t if event.condition is not None else event.notice.t if event.notice is not None else math.nan
    return t if t == t else math.inf


class ChannelBank:
    """Every configured channel, updated sample by sample, vectorised across channels.

    Parameters
    ----------
    channels : mapping of channel id to :class:`ChannelSettings`
    tuning : PathTuning, optional
        When the vectorised paths take over from the scalar ones (speed only;
        every choice gives the same bits).
    """

    def __init__(self, channels: Mapping[str, ChannelSettings], tuning: PathTuning | None = None) -> None:
        tuning = PathTuning() if tuning is None else tuning
        if not channels:
            raise ValueError("channels must name at least one channel")
        shapes: dict[tuple[object, ...], list[tuple[str, ChannelSettings]]] = {}
        for cid, settings in channels.items():
            shapes.setdefault(shape_key(settings), []).append((cid, settings))
        self._groups = [ChannelGroup(members, tuning) for members in shapes.values()]
        self._lanes: dict[str, Lane] = {lane.channel: lane for g in self._groups for lane in g.lanes}
        self.channel_ids: tuple[str, ...] = tuple(channels)
        self._order = {cid: k for k, cid in enumerate(self.channel_ids)}

    def __contains__(self, channel: object) -> bool:
        return channel in self._lanes

    def settings(self, channel: str) -> ChannelSettings:
        return self._lanes[channel].settings

    # -------------------------------------------------------------- state
    def state(self) -> ChannelBankState:
        """Copy of every group's state; see :class:`ChannelBankState`."""
        return ChannelBankState(tuple(group.state() for group in self._groups))

    def restore(self, state: ChannelBankState) -> None:
        """Take back a :meth:`state` of a bank of this configuration; ``state()`` then equals it.

        Raises
        ------
        ValueError
            A state of other groups, channels, shapes or settings; the bank is left as it was.
        """
        if len(state.groups) != len(self._groups):
            raise ValueError(f"state of {len(state.groups)} groups; this bank has {len(self._groups)}")
        before = self.state()
        try:
            for group, group_state in zip(self._groups, state.groups, strict=True):
                group.restore(group_state)
        except ValueError:
            for group, group_state in zip(self._groups, before.groups, strict=True):
                group.restore(group_state)             # a part refused: every part as it was
            raise

    # -------------------------------------------------------- baselines, events
    def take_events(self) -> list[ChannelEvent]:
        """Condition changes and new baselines since the last call (per channel in the order they happened)."""
        events: list[ChannelEvent] = []
        for group in self._groups:
            for item in group.watch.take():
                channel = group.lanes[item.index].channel
                events.append(ChannelEvent(channel, condition=item) if isinstance(item, ConditionEvent)
                              else ChannelEvent(channel, notice=item))
        # Groups keep their own lists: in sample time, then channel order, the order does not depend on
        # how samples were split into micro-batches (each channel's own events stay in order: sort is stable).
        order = self._order
        events.sort(key=lambda e: (_time_key(e), order[e.channel]))
        return events

    def baseline_version(self, channel: str) -> int | None:
        """Version of the baseline in force (None while commissioning)."""
        lane = self._lanes[channel]
        watch = lane.group.watch
        current = watch.histories[lane.index].current
        return current.version if current is not None and watch.detectors.has_baseline[lane.index] else None

    def baselines(self, channel: str) -> list[Baseline]:
        """Every baseline of a channel, oldest first (the last is in force unless the channel was reset)."""
        lane = self._lanes[channel]
        return list(lane.group.watch.histories[lane.index].versions)

    def learn_baseline(self, channel: str, t: float | None = None, note: str = "") -> Baseline | None:
        """A new baseline from the channel's current estimates; None while they cannot be judged."""
        lane = self._lanes[channel]
        return lane.group.watch.learn(lane.index, t, "learned",
                                      samples=int(lane.group.watch.commissioned[lane.index]), note=note)

    def set_baseline(self, channel: str, parameters: Sequence[float], *, noise_sigma: float,
                     covariance: Sequence[Sequence[float]] | None = None, source: str = "engineer",
                     t: float | None = None, note: str = "") -> Baseline:
        """Put a given baseline in force (an engineer's calibration, or ``rwls fit`` output)."""
        lane = self._lanes[channel]
        watch = lane.group.watch
        n = len(lane.terms)
        cov = np.zeros((n, n)) if covariance is None else np.asarray(covariance, dtype=np.float64)
        baseline = Baseline(watch.histories[lane.index].next_version, source, np.asarray(parameters, dtype=float),
                            cov, float(noise_sigma), None, t, 0, note)
        watch.set(lane.index, baseline)
        return baseline

    def set_baselines(self, channels: Sequence[str], parameters: Sequence[float], *, noise_sigma: float,
                      covariance: Sequence[Sequence[float]] | None = None, source: str = "engineer",
                      t: float | None = None, note: str = "") -> None:
        """:meth:`set_baseline` of one baseline for each of ``channels``, in turn; channels whose next version is
        the same share one :class:`Baseline` (made, and checked, once: 100,000 channels configured alike)."""
        made: dict[tuple[int, int], Baseline] = {}
        for channel in channels:
            lane = self._lanes[channel]
            watch = lane.group.watch
            key = (watch.histories[lane.index].next_version, len(lane.terms))
            baseline = made.get(key)
            if baseline is None:
                baseline = made[key] = self.set_baseline(channel, parameters, noise_sigma=noise_sigma,
                                                         covariance=covariance, source=source, t=t, note=note)
                continue
            watch.set(lane.index, baseline)

    def reset(self, channel: str, t: float | None = None) -> None:
        """Start the channel's estimator afresh: no baseline in force, commissioning again.

        Ordering is kept (a redelivered sample is still refused), and so are the counts and the
        baseline history.
        """
        lane = self._lanes[channel]
        group = lane.group
        group.wls.reset_channel(lane.index)
        group.tracker.reset_channel(lane.index)
        if group.model is not None:
            group.model.reset_channel(lane.index)
        for builder in lane.builders:
            builder.clear()
        lane.last_tracked_t = None
        group.watch.restart(lane.index, t)

    def apply_one(self, sample: Sample) -> SampleOutcome:
        """Apply one sample (scalar paths); an unknown channel is refused ``unknown_channel``."""
        lane = self._lanes.get(sample.channel)
        if lane is None:
            return SampleOutcome("refused", SampleRefusal.UNKNOWN_CHANNEL)
        prepared = lane.prepare(sample)
        if isinstance(prepared, SampleOutcome):
            return prepared
        return lane.group.update([(lane, prepared)])[0]

    def apply(self, samples: Sequence[Sample]) -> list[SampleOutcome]:
        """Apply a micro-batch; outcomes align with ``samples``. Per channel, order is kept."""
        outcomes: list[SampleOutcome | None] = [None] * len(samples)
        queues: dict[str, deque[int]] = {}
        for pos, sample in enumerate(samples):
            if sample.channel in self._lanes:
                queues.setdefault(sample.channel, deque()).append(pos)
            else:
                outcomes[pos] = SampleOutcome("refused", SampleRefusal.UNKNOWN_CHANNEL)
        while queues:
            by_group: dict[int, list[tuple[Lane, Prepared, int]]] = {}
            for cid in list(queues):
                queue = queues[cid]
                pos = queue.popleft()
                if not queue:
                    del queues[cid]
                lane = self._lanes[cid]
                prepared = lane.prepare(samples[pos])
                if isinstance(prepared, SampleOutcome):
                    outcomes[pos] = prepared
                else:
                    by_group.setdefault(id(lane.group), []).append((lane, prepared, pos))
            for items in by_group.values():
                group = items[0][0].group
                results = group.update([(lane, p) for lane, p, _ in items])
                for (_, _, pos), outcome in zip(items, results, strict=True):
                    outcomes[pos] = outcome
        return [o if o is not None else SampleOutcome("refused", SampleRefusal.INTERNAL) for o in outcomes]

    def apply_columns(self, columns: Mapping[str, SampleColumns], keep_rows: bool = False
                      ) -> dict[str, ColumnsOutcome]:
        """Apply each channel's columns in order: the same state and outcomes as :meth:`apply`.

        Channels whose columns pass every check in whole-array form run in
        vectorised rounds (:mod:`estimator.channels.column_rounds`); the others, and
        any remainder, take :meth:`apply`, which finds each refusal's reason.
        Samples of an unknown channel are refused ``unknown_channel``.
        With ``keep_rows``, each known channel's outcome carries its fitted samples
        (regressor rows, outputs, the weights used) as :class:`AppliedRows`.
        """
        outcomes: dict[str, ColumnsOutcome] = {}
        by_group: dict[int, list[tuple[Lane, SampleColumns]]] = {}
        for cid, cols in columns.items():
            lane = self._lanes.get(cid)
            if lane is None:
                outcomes[cid] = ColumnsOutcome(refused=[(k, SampleRefusal.UNKNOWN_CHANNEL) for k in range(len(cols))])
            else:
                by_group.setdefault(id(lane.group), []).append((lane, cols))
        leftovers: list[tuple[Lane, SampleColumns, int]] = []
        for entries in by_group.values():
            done, rest = apply_group_columns(entries[0][0].group, entries, keep_rows)
            outcomes.update(done)
            leftovers.extend(rest)
        if not leftovers:
            return self._with_rows(columns, outcomes, {}) if keep_rows else outcomes
        samples: list[Sample] = []
        places: list[tuple[str, int]] = []
        for lane, cols, start in leftovers:
            for pos, sample in enumerate(cols.samples(lane.channel, start), start):
                samples.append(sample)
                places.append((lane.channel, pos))
        exact_rows: dict[str, list[tuple[int, list[float], float, float]]] = {}
        for (cid, pos), outcome, sample in zip(places, self.apply(samples), samples, strict=True):
            result = outcomes.setdefault(cid, ColumnsOutcome())
            if outcome.status == "applied":
                result.applied += 1
                result.last_applied = pos
                if keep_rows and outcome.regressor is not None:
                    exact_rows.setdefault(cid, []).append((pos, outcome.regressor, sample.y, outcome.weight))
            elif outcome.status == "warmup":
                result.warmup += 1
            else:
                result.refused.append((pos, outcome.reason))
        return self._with_rows(columns, outcomes, exact_rows) if keep_rows else outcomes

    def _with_rows(self, columns: Mapping[str, SampleColumns], outcomes: dict[str, ColumnsOutcome],
                   exact_rows: dict[str, list[tuple[int, list[float], float, float]]]) -> dict[str, ColumnsOutcome]:
        """Each known channel's rows: the vectorised rounds' first, then the exact path's (later positions)."""
        for cid in columns:
            lane = self._lanes.get(cid)
            if lane is None:
                continue
            result = outcomes.setdefault(cid, ColumnsOutcome())
            n = len(lane.terms)
            parts = [result.rows] if result.rows is not None else []
            exact = exact_rows.get(cid)
            if exact:
                parts.append(AppliedRows(np.array([e[0] for e in exact], dtype=np.intp),
                                         np.array([e[1] for e in exact], dtype=np.float64).reshape(-1, n),
                                         np.array([e[2] for e in exact], dtype=np.float64),
                                         np.array([e[3] for e in exact], dtype=np.float64)))
            result.rows = AppliedRows.join(parts, n)
        return outcomes

    def view(self, channels: Sequence[str] | None = None) -> dict[str, ChannelView]:
        """Statistics of the given channels (default all), computed per group in one batch."""
        wanted = self.channel_ids if channels is None else channels
        views = {block.channels[k]: block.view(k) for block in self.view_blocks(wanted) for k in range(len(block))}
        return {c: views[c] for c in wanted}

    def view_blocks(self, channels: Sequence[str] | None = None) -> list[ViewBlock]:
        """The state of the given channels (default all) as one :class:`ViewBlock` per group, in whole-array
        steps; a channel's :class:`ChannelView` is ``block.view(k)``, built when asked for."""
        wanted = self.channel_ids if channels is None else channels
        lanes = [self._lanes[c] for c in wanted]
        blocks = []
        for group in self._groups:
            members = [lane for lane in lanes if lane.group is group]
            if not members:
                continue
            idx = np.array([lane.index for lane in members], dtype=np.intp)
            stats = bank_statistics(group.wls.factor(idx), group.wls.effective_count[idx], scale="known")
            residual_var = stats.residual_sd ** 2
            estimated = np.array([lane.settings.covariance_scale == "estimated" for lane in members])
            cov = stats.unscaled_covariance * np.where(estimated, residual_var, 1.0)[:, None, None]
            std = np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))
            variance = group.tracker.variance()[idx]
            watch = group.watch
            statistics, limits, active = watch.detectors.readings_columns(idx)
            histories = watch.histories
            has_baseline = watch.detectors.has_baseline[idx].tolist()
            counters = [lane.counters for lane in members]
            # Columns as arrays, not lists: the first snapshot holds every channel's (8 B a number, not 32).
            finite = np.isfinite(stats.parameters).all(axis=1)
            blocks.append(ViewBlock(
                channels=[lane.channel for lane in members], terms=[lane.terms for lane in members],
                settings=[lane.settings for lane in members], parameters=stats.parameters, std_errors=std,
                covariance=cov, residual_sd=stats.residual_sd, dof=stats.dof,
                noise_sigma=np.sqrt(np.where(variance >= 0.0, variance, np.nan)),
                effective_count=stats.effective_count, min_information=stats.min_information,
                information_condition=stats.information_condition, identifiable=stats.identifiable,
                estimable=stats.identifiable & finite,
                applied=[c.applied for c in counters], warmup=[c.warmup for c in counters],
                refused=[dict(c.refused) for c in counters], last_t=[lane.last_t for lane in members],
                baseline=[histories[lane.index].current if has else None
                          for lane, has in zip(members, has_baseline, strict=True)],
                commissioned=watch.commissioned[idx], statistics=statistics, limits=limits, active=active,
                last_innovation=watch.last_innovation[idx], last_spread=watch.last_spread[idx]))
        return blocks
