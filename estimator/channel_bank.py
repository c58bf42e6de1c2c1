"""All channels of a plant: samples in, estimates out, vectorised across channels.

Channels whose estimators have the same shape (parameter count, noise-tracker
mode, operating-point model size) share one :class:`RecursiveWLSBank`, one
:class:`NoiseVarianceTracker` and one :class:`LogVarianceModel`, each holding
per-channel settings in arrays. :meth:`ChannelBank.apply` takes a micro-batch of
samples, keeps each channel's samples in arrival order, and works in rounds:
round r holds the r-th sample of every channel that has one, so a round
touches each channel at most once and is one vectorised step per group.

For each sample of a round, in this order (see :mod:`estimator.channel`):
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

from estimator.channel import (
    ChannelCounters,
    ChannelSettings,
    Prepared,
    Sample,
    SampleOutcome,
    check_sample,
    sample_weight,
)
from estimator.column_rounds import PathTuning, apply_group_columns
from estimator.log_variance import LogVarianceModel
from estimator.regressors import NotUsable, RegressorBuilder, RegressorSpec
from estimator.rwls import RecursiveWLSBank, RejectedSample
from estimator.sample_columns import ColumnsOutcome, SampleColumns
from estimator.statistics import bank_statistics
from estimator.variance import NoiseVarianceTracker

__all__ = ["ChannelBank", "ChannelView"]

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class ChannelView:
    """One channel's state for readers (its arrays are fresh, never views of live state; NaN where unknown).

    Attributes
    ----------
    parameters, std_errors : shape (n,)
    covariance : shape (n, n), scaled as the channel's ``covariance_scale`` says
    """

    channel: str
    terms: tuple[str, ...]
    parameters: FloatArray
    std_errors: FloatArray
    covariance: FloatArray
    residual_sd: float
    dof: float
    noise_sigma: float
    effective_count: float
    min_information: float
    information_condition: float
    identifiable: bool
    applied: int
    warmup: int
    rejected: dict[str, int]
    last_t: float | None
    settings: ChannelSettings


class _Lane:
    """Per-channel scalar state: lag buffers, ordering, counters."""

    def __init__(self, channel: str, settings: ChannelSettings, group: _Group, index: int) -> None:
        self.channel = channel
        self.settings = settings
        self.spec = RegressorSpec(settings.terms)
        self.terms = tuple(self.spec.names)
        self.builder = RegressorBuilder(self.spec)
        self.noise_builder = (RegressorBuilder(RegressorSpec(settings.noise_model_terms))
                              if settings.noise_model_terms else None)
        self.builders = [b for b in (self.builder, self.noise_builder) if b is not None]
        self.group = group
        self.index = index
        # Lanes with the same key share one regressor block in the column path.
        self.terms_key = (settings.terms, settings.noise_model_terms, settings.input_names)
        self.input_name_set = frozenset(settings.input_names)
        self.counters = ChannelCounters()
        self.last_t: float | None = None
        self.last_seq: int | None = None
        self.last_tracked_t: float | None = None

    def reject(self, reason: str) -> SampleOutcome:
        self.counters.rejected[reason] = self.counters.rejected.get(reason, 0) + 1
        return SampleOutcome("rejected", reason)

    def prepare(self, sample: Sample) -> Prepared | SampleOutcome:
        """Checks, regressor and weight; an outcome when the sample goes no further."""
        reason = check_sample(self.settings, sample, self.last_t, self.last_seq)
        if reason is not None:
            return self.reject(reason)
        try:
            z = self.builder.row(sample.inputs)
            z_noise = self.noise_builder.row(sample.inputs) if self.noise_builder is not None else None
        except NotUsable as exc:
            if exc.reason != "lags_not_filled":
                return self.reject(exc.reason)
            self.accept(sample)
            self.counters.warmup += 1
            return SampleOutcome("warmup")
        w = sample_weight(self.settings, sample, self.group.variance_before(self.index, z_noise))
        if w is None:
            return self.reject("missing_weight")
        if not (math.isfinite(w) and w > 0.0):
            return self.reject("bad_weight")
        return Prepared(sample, z, z_noise, w)

    def accept(self, sample: Sample) -> None:
        self.builder.push(sample.inputs, sample.y)
        if self.noise_builder is not None:
            self.noise_builder.push(sample.inputs, sample.y)
        if sample.t is not None:
            self.last_t = sample.t
        if sample.seq is not None:
            self.last_seq = sample.seq

    def elapsed(self, t: float | None) -> float | None:
        """Seconds since the last tracked sample, for a half-life in seconds (None: first)."""
        if not self.settings.noise_half_life_in_seconds or self.last_tracked_t is None or t is None:
            return None
        return t - self.last_tracked_t


class _Group:
    """Channels of one estimator shape: a bank, a tracker and an optional operating-point model."""

    def __init__(self, members: list[tuple[str, ChannelSettings]], tuning: PathTuning) -> None:
        self.tuning = tuning
        first = members[0][1]
        k = len(members)
        n = len(first.terms)
        self.time_based = first.noise_half_life_in_seconds
        self.bank = RecursiveWLSBank(k, n, [s.forgetting_factor for _, s in members],
                                     np.array([[s.covariance_limit] * n for _, s in members]))
        self.tracker = NoiseVarianceTracker(k, [s.noise_half_life for _, s in members],
                                            time_based=self.time_based, robust=first.noise_robust,
                                            warmup=first.noise_warmup)
        m = len(first.noise_model_terms)
        self.model = (LogVarianceModel(k, m, [s.noise_model_forgetting_factor for _, s in members])
                      if m else None)
        self.lanes = [_Lane(cid, s, self, i) for i, (cid, s) in enumerate(members)]

    def variance_before(self, index: int, z_noise: list[float] | None) -> float:
        """Noise variance known before the next sample of a channel: the model's, else the tracker's."""
        if self.model is not None and z_noise is not None:
            variance = self.model.variance_one(index, z_noise)
            if math.isfinite(variance):
                return variance
        return self.tracker.variance_one(index)

    def update(self, items: list[tuple[_Lane, Prepared]]) -> list[SampleOutcome]:
        """One recursive step for samples of distinct channels of this group."""
        if len(items) < self.tuning.vector_min:
            return [self._update_one(lane, p) for lane, p in items]
        idx = np.array([lane.index for lane, _ in items], dtype=np.intp)
        Z = np.array([p.z for _, p in items], dtype=np.float64)
        y = np.array([p.sample.y for _, p in items], dtype=np.float64)
        w = np.array([p.weight for _, p in items], dtype=np.float64)
        kappa = self.bank.kappa(idx)
        try:
            result = self.bank.update(Z, y, w, idx)
        except RejectedSample:
            # Some row overflowed (e.g. a power of a huge input): apply one by one
            # so only the offending samples are refused.
            return [self._update_one(lane, p) for lane, p in items]
        elapsed = None
        if self.time_based:
            elapsed = np.array([_or_inf(lane.elapsed(p.sample.t)) for lane, p in items])
        tracked = self.tracker.update(idx, result.innovation, result.leverage, kappa, elapsed)
        if self.model is not None:
            Zop = np.array([p.z_noise for _, p in items], dtype=np.float64)
            self.model.update(idx, Zop, result.innovation, result.leverage, kappa)
        outcomes = []
        for k, (lane, p) in enumerate(items):
            if tracked[k] and p.sample.t is not None:
                lane.last_tracked_t = p.sample.t
            outcomes.append(self._applied(lane, p, float(result.innovation[k]), float(result.leverage[k])))
        return outcomes

    def _update_one(self, lane: _Lane, p: Prepared) -> SampleOutcome:
        i = lane.index
        kappa = self.bank.kappa_one(i)
        try:
            innovation, leverage = self.bank.update_one(i, p.z, p.sample.y, p.weight)
        except RejectedSample as exc:
            return lane.reject(exc.reason)
        elapsed = _or_inf(lane.elapsed(p.sample.t)) if self.time_based else None
        if self.tracker.update_one(i, innovation, leverage, kappa, elapsed) and p.sample.t is not None:
            lane.last_tracked_t = p.sample.t
        if self.model is not None and p.z_noise is not None:
            self.model.update_one(i, p.z_noise, innovation, leverage, kappa)
        return self._applied(lane, p, innovation, leverage)

    @staticmethod
    def _applied(lane: _Lane, p: Prepared, innovation: float, leverage: float) -> SampleOutcome:
        lane.accept(p.sample)
        lane.counters.applied += 1
        return SampleOutcome("applied", innovation=innovation, leverage=leverage, weight=p.weight,
                             regressor=p.z)


def _or_inf(elapsed: float | None) -> float:
    # The tracker takes inf for "no previous tracked sample": the new one then carries full weight.
    return math.inf if elapsed is None else elapsed


def _shape_key(settings: ChannelSettings) -> tuple[object, ...]:
    return (len(settings.terms), settings.noise_half_life_in_seconds, settings.noise_robust,
            settings.noise_warmup, len(settings.noise_model_terms))


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
            shapes.setdefault(_shape_key(settings), []).append((cid, settings))
        self._groups = [_Group(members, tuning) for members in shapes.values()]
        self._lanes: dict[str, _Lane] = {lane.channel: lane for g in self._groups for lane in g.lanes}
        self.channel_ids: tuple[str, ...] = tuple(channels)

    def __contains__(self, channel: object) -> bool:
        return channel in self._lanes

    def settings(self, channel: str) -> ChannelSettings:
        return self._lanes[channel].settings

    def apply_one(self, sample: Sample) -> SampleOutcome:
        """Apply one sample (scalar paths); an unknown channel is rejected ``unknown_channel``."""
        lane = self._lanes.get(sample.channel)
        if lane is None:
            return SampleOutcome("rejected", "unknown_channel")
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
                outcomes[pos] = SampleOutcome("rejected", "unknown_channel")
        while queues:
            by_group: dict[int, list[tuple[_Lane, Prepared, int]]] = {}
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
        return [o if o is not None else SampleOutcome("rejected", "internal") for o in outcomes]

    def apply_columns(self, columns: Mapping[str, SampleColumns]) -> dict[str, ColumnsOutcome]:
        """Apply each channel's columns in order: the same state and outcomes as :meth:`apply`.

        Channels whose columns pass every check in whole-array form run in
        vectorised rounds (:mod:`estimator.column_rounds`); the others, and
        any remainder, take :meth:`apply`, which finds each refusal's reason.
        Samples of an unknown channel are rejected ``unknown_channel``.
        """
        outcomes: dict[str, ColumnsOutcome] = {}
        by_group: dict[int, list[tuple[_Lane, SampleColumns]]] = {}
        for cid, cols in columns.items():
            lane = self._lanes.get(cid)
            if lane is None:
                outcomes[cid] = ColumnsOutcome(rejected=[(k, "unknown_channel") for k in range(len(cols))])
            else:
                by_group.setdefault(id(lane.group), []).append((lane, cols))
        leftovers: list[tuple[_Lane, SampleColumns, int]] = []
        for entries in by_group.values():
            done, rest = apply_group_columns(entries[0][0].group, entries)
            outcomes.update(done)
            leftovers.extend(rest)
        if not leftovers:
            return outcomes
        samples: list[Sample] = []
        places: list[tuple[str, int]] = []
        for lane, cols, start in leftovers:
            for pos, sample in enumerate(cols.samples(lane.channel, start), start):
                samples.append(sample)
                places.append((lane.channel, pos))
        for (cid, pos), outcome in zip(places, self.apply(samples), strict=True):
            result = outcomes.setdefault(cid, ColumnsOutcome())
            if outcome.status == "applied":
                result.applied += 1
                result.last_applied = pos
            elif outcome.status == "warmup":
                result.warmup += 1
            else:
                result.rejected.append((pos, outcome.reason))
        return outcomes

    def view(self, channels: Sequence[str] | None = None) -> dict[str, ChannelView]:
        """Statistics of the given channels (default all), computed per group in one batch."""
        wanted = self.channel_ids if channels is None else channels
        lanes = [self._lanes[c] for c in wanted]
        views: dict[str, ChannelView] = {}
        for group in self._groups:
            members = [lane for lane in lanes if lane.group is group]
            if not members:
                continue
            idx = np.array([lane.index for lane in members], dtype=np.intp)
            stats = bank_statistics(group.bank.factor(idx), group.bank.effective_count[idx], scale="known")
            # Whole-group arrays first (one numpy call each), then one view per channel.
            residual_var = stats.residual_sd ** 2
            estimated = np.array([lane.settings.covariance_scale == "estimated" for lane in members])
            cov = stats.unscaled_covariance * np.where(estimated, residual_var, 1.0)[:, None, None]
            std = np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))
            variance = group.tracker.variance()[idx]
            noise = np.sqrt(np.where(variance >= 0.0, variance, np.nan)).tolist()
            scalars = zip(stats.residual_sd.tolist(), stats.dof.tolist(), stats.effective_count.tolist(),
                          stats.min_information.tolist(), stats.information_condition.tolist(),
                          stats.identifiable.tolist(), noise, strict=True)
            for k, (lane, (rsd, dof, n_eff, min_info, condition, ident, sigma)) in enumerate(
                    zip(members, scalars, strict=True)):
                views[lane.channel] = ChannelView(
                    channel=lane.channel, terms=lane.terms, parameters=stats.parameters[k], std_errors=std[k],
                    covariance=cov[k], residual_sd=rsd, dof=dof, noise_sigma=sigma, effective_count=n_eff,
                    min_information=min_info, information_condition=condition, identifiable=ident,
                    applied=lane.counters.applied, warmup=lane.counters.warmup,
                    rejected=dict(lane.counters.rejected), last_t=lane.last_t, settings=lane.settings)
        return {c: views[c] for c in wanted}
