"""A group of channels of one estimator shape, and each channel's scalar state (lanes).

A group shares one :class:`RecursiveWLSBank`, one :class:`NoiseVarianceTracker`,
an optional :class:`LogVarianceModel` and a :class:`GroupWatch` (detectors,
baselines); a lane holds what is per channel and scalar: settings, lag
buffers, ordering, counters. :meth:`ChannelGroup.update` is one round of the exact
path (see :mod:`estimator.channels.channel_bank`). Both export their state
(:class:`LaneState`, :class:`GroupState`, made of the parts' own states) and take it back.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel import (
    ChannelCounters,
    ChannelSettings,
    PathTuning,
    Prepared,
    Sample,
    SampleOutcome,
    Weighting,
    check_sample,
    sample_weight,
)
from estimator.channels.group_watch import GroupWatch, WatchState
from estimator.channels.regressors import BuilderState, NotUsable, RegressorBuilder, RegressorSpec
from estimator.noise.log_variance import LogVarianceModel, LogVarianceState
from estimator.noise.variance import NoiseVarianceTracker, TrackerState
from estimator.recursive.rwls import BankState, RecursiveWLSBank, SampleRefused
from estimator.recursive.sample_refusal import SampleRefusal
from estimator.recursive.weight_rule import weight_is_usable

__all__ = ["ChannelGroup", "GroupState", "Lane", "LanePlan", "LaneState", "declared_variance", "shape_key"]


@dataclass(frozen=True, slots=True)      # slots: one per channel at every checkpoint
class LaneState:
    """Copy of a :class:`Lane`'s per-channel scalars: counters, ordering and lag buffers.

    ``channel`` names the lane's channel; ``refused`` counts refusals by reason; ``last_t`` and
    ``last_seq`` belong to the last accepted sample, ``last_tracked_t`` to the last the noise tracker
    took (None before any); ``builders`` are the regressor builders' states, the noise model's second.
    """

    channel: str
    applied: int
    warmup: int
    refused: Mapping[str, int]
    last_t: float | None
    last_seq: int | None
    last_tracked_t: float | None
    builders: tuple[BuilderState, ...]


@dataclass(frozen=True)
class GroupState:
    """Copy of a :class:`ChannelGroup`: its estimators' states and one :class:`LaneState` per channel.

    ``model`` is None for a group without an operating-point noise model. Lanes in channel-index order.
    """

    wls: BankState
    tracker: TrackerState
    model: LogVarianceState | None
    watch: WatchState
    lanes: tuple[LaneState, ...]


class LanePlan:
    """What every lane of one settings object shares, worked out once: the parsed term lists, the parameter
    names, the inputs read (100,000 channels alike parse their terms once, not 100,000 times)."""

    __slots__ = ("input_name_set", "noise_spec", "settings", "spec", "terms", "terms_key")

    def __init__(self, settings: ChannelSettings) -> None:
        self.settings = settings
        self.spec = RegressorSpec(settings.terms)
        self.noise_spec = RegressorSpec(settings.noise_model_terms) if settings.noise_model_terms else None
        self.terms = tuple(self.spec.names)
        # Lanes with the same key share one regressor block in the column path.
        self.terms_key = (settings.terms, settings.noise_model_terms, settings.input_names)
        self.input_name_set = frozenset(settings.input_names)


class Lane:
    """One channel of a group: its settings and scalar state (lag buffers, ordering, counters).

    Slots, and what follows from the settings in a shared :class:`LanePlan`: a service holds one lane per
    channel, 100,000 of them.
    """

    __slots__ = ("builder", "builders", "channel", "counters", "group", "index", "last_seq", "last_t",
                 "last_tracked_t", "noise_builder", "plan", "settings")

    def __init__(self, channel: str, plan: LanePlan, group: ChannelGroup, index: int) -> None:
        self.channel = channel
        self.plan = plan
        self.settings = plan.settings
        self.builder = RegressorBuilder(plan.spec)
        self.noise_builder = RegressorBuilder(plan.noise_spec) if plan.noise_spec is not None else None
        self.builders = (self.builder,) if self.noise_builder is None else (self.builder, self.noise_builder)
        self.group = group
        self.index = index
        self.counters = ChannelCounters()
        self.last_t: float | None = None
        self.last_seq: int | None = None
        self.last_tracked_t: float | None = None

    @property
    def spec(self) -> RegressorSpec:
        return self.plan.spec

    @property
    def terms(self) -> tuple[str, ...]:
        """The parameter names (canonical term texts)."""
        return self.plan.terms

    @property
    def terms_key(self) -> tuple[tuple[str, ...], tuple[str, ...], tuple[str, ...]]:
        return self.plan.terms_key

    @property
    def input_name_set(self) -> frozenset[str]:
        return self.plan.input_name_set

    def refuse(self, reason: str) -> SampleOutcome:
        self.counters.refused[reason] = self.counters.refused.get(reason, 0) + 1
        return SampleOutcome("refused", reason)

    def prepare(self, sample: Sample) -> Prepared | SampleOutcome:
        """Checks, regressor and weight; an outcome when the sample goes no further."""
        reason = check_sample(self.settings, sample, self.last_t, self.last_seq)
        if reason is not None:
            return self.refuse(reason)
        try:
            z = self.builder.row(sample.inputs)
            z_noise = self.noise_builder.row(sample.inputs) if self.noise_builder is not None else None
        except NotUsable as exc:
            if exc.reason != "lags_not_filled":
                return self.refuse(exc.reason)
            self.accept(sample)
            self.counters.warmup += 1
            return SampleOutcome("warmup")
        w = sample_weight(self.settings, sample, self.group.variance_before(self.index, z_noise))
        if w is None:
            return self.refuse(SampleRefusal.MISSING_WEIGHT)
        if not weight_is_usable(w):
            return self.refuse(SampleRefusal.BAD_WEIGHT)
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

    def state(self) -> LaneState:
        """Copy of the counters, the ordering and the lag buffers; see :class:`LaneState`."""
        counters = self.counters
        return LaneState(self.channel, counters.applied, counters.warmup, dict(counters.refused), self.last_t,
                         self.last_seq, self.last_tracked_t, tuple([b.state() for b in self.builders]))

    def check(self, state: LaneState) -> None:
        """``ValueError`` unless ``state`` is one of this lane's channel with as many builders."""
        if state.channel != self.channel or len(state.builders) != len(self.builders):
            raise ValueError(f"state of channel {state.channel!r} with {len(state.builders)} builders; this lane: "
                             f"{self.channel!r} with {len(self.builders)}")

    def restore(self, state: LaneState) -> None:
        """Take back a :meth:`state` of this channel; ``state()`` then equals it.

        Raises
        ------
        ValueError
            A state of another channel, or builders of other lags (see :meth:`RegressorBuilder.restore`).
        """
        self.check(state)
        for builder, builder_state in zip(self.builders, state.builders, strict=True):
            builder.restore(builder_state)
        self.counters.applied, self.counters.warmup = state.applied, state.warmup
        self.counters.refused = dict(state.refused)
        self.last_t, self.last_seq, self.last_tracked_t = state.last_t, state.last_seq, state.last_tracked_t


class ChannelGroup:
    """Channels of one estimator shape: their recursive WLS arrays (``wls``), a tracker, an operating-point model."""

    def __init__(self, members: list[tuple[str, ChannelSettings]], tuning: PathTuning) -> None:
        self.tuning = tuning
        first = members[0][1]
        k = len(members)
        n = len(first.terms)
        self.time_based = first.noise_half_life_in_seconds
        limits = np.array([s.covariance_limit for _, s in members], dtype=np.float64)
        self.wls = RecursiveWLSBank(k, n, [s.forgetting_factor for _, s in members],
                                     np.repeat(limits[:, None], n, axis=1))
        self.tracker = NoiseVarianceTracker(k, [s.noise_half_life for _, s in members],
                                            time_based=self.time_based, robust=first.noise_robust,
                                            warmup=first.noise_warmup)
        m = len(first.noise_model_terms)
        self.model = (LogVarianceModel(k, m, [s.noise_model_forgetting_factor for _, s in members])
                      if m else None)
        plans: dict[int, LanePlan] = {}          # by settings object: channels alike share one
        self.lanes = [Lane(cid, plans.get(id(s)) or plans.setdefault(id(s), LanePlan(s)), self, i)
                      for i, (cid, s) in enumerate(members)]
        self.watch = GroupWatch([s for _, s in members], self.wls, self.tracker, self.model)

    def state(self) -> GroupState:
        """Copy of the estimators' states and each lane's; see :class:`GroupState`."""
        return GroupState(self.wls.state(), self.tracker.state(), None if self.model is None else self.model.state(),
                          self.watch.state(), tuple([lane.state() for lane in self.lanes]))

    def restore(self, state: GroupState) -> None:
        """Take back a :meth:`state` of a group of these channels and settings; ``state()`` then equals it.

        Raises
        ------
        ValueError
            A state of other channels, shapes or settings (each part's ``restore`` names what differs).
        """
        if len(state.lanes) != len(self.lanes) or (state.model is None) != (self.model is None):
            raise ValueError(f"state of {len(state.lanes)} channels, model {state.model is not None}; this group: "
                             f"{len(self.lanes)} channels, model {self.model is not None}")
        for lane, lane_state in zip(self.lanes, state.lanes, strict=True):
            lane.check(lane_state)
        self.wls.restore(state.wls)
        self.tracker.restore(state.tracker)
        if self.model is not None and state.model is not None:
            self.model.restore(state.model)
        self.watch.restore(state.watch)
        for lane, lane_state in zip(self.lanes, state.lanes, strict=True):
            lane.restore(lane_state)

    def variance_before(self, index: int, z_noise: list[float] | None) -> float:
        """Noise variance known before the next sample of a channel: the model's, else the tracker's."""
        if self.model is not None and z_noise is not None:
            variance = self.model.variance_one(index, z_noise)
            if math.isfinite(variance):
                return variance
        return self.tracker.variance_one(index)

    def update(self, items: list[tuple[Lane, Prepared]]) -> list[SampleOutcome]:
        """One round for samples of distinct channels of this group: update, tracker, model, detectors."""
        idx = np.array([lane.index for lane, _ in items], dtype=np.intp)
        z_op = np.array([p.z_noise for _, p in items], dtype=np.float64) if self.model is not None else None
        declared = np.array([declared_variance(lane.settings, p.sample) for lane, p in items])
        kappa = self.wls.kappa(idx)
        outcomes = self._recursion(items, idx, kappa)
        applied = np.array([o.status == "applied" for o in outcomes], dtype=bool)
        if applied.any():
            t = np.array([math.nan if p.sample.t is None else p.sample.t for _, p in items])
            e = np.array([o.innovation for o in outcomes])
            h = np.array([o.leverage for o in outcomes])
            self.watch.after_round(idx[applied], t[applied], e[applied], h[applied], kappa[applied],
                                   declared[applied],
                                   None if z_op is None else z_op[applied])
        return outcomes

    def _recursion(self, items: list[tuple[Lane, Prepared]], idx: NDArray[np.intp], kappa: NDArray[np.float64]
                   ) -> list[SampleOutcome]:
        if len(items) < self.tuning.vector_min:
            return [self._update_one(lane, p) for lane, p in items]
        Z = np.array([p.z for _, p in items], dtype=np.float64)
        y = np.array([p.sample.y for _, p in items], dtype=np.float64)
        w = np.array([p.weight for _, p in items], dtype=np.float64)
        try:
            result = self.wls.update(Z, y, w, idx)
        except SampleRefused:
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

    def _update_one(self, lane: Lane, p: Prepared) -> SampleOutcome:
        i = lane.index
        kappa = self.wls.kappa_one(i)
        try:
            innovation, leverage = self.wls.update_one(i, p.z, p.sample.y, p.weight)
        except SampleRefused as exc:
            return lane.refuse(exc.reason)
        elapsed = _or_inf(lane.elapsed(p.sample.t)) if self.time_based else None
        if self.tracker.update_one(i, innovation, leverage, kappa, elapsed) and p.sample.t is not None:
            lane.last_tracked_t = p.sample.t
        if self.model is not None and p.z_noise is not None:
            self.model.update_one(i, p.z_noise, innovation, leverage, kappa)
        return self._applied(lane, p, innovation, leverage)

    @staticmethod
    def _applied(lane: Lane, p: Prepared, innovation: float, leverage: float) -> SampleOutcome:
        lane.accept(p.sample)
        lane.counters.applied += 1
        return SampleOutcome("applied", innovation=innovation, leverage=leverage, weight=p.weight,
                             regressor=p.z)


def declared_variance(settings: ChannelSettings, sample: Sample) -> float:
    """The noise variance a sample declares under ``sample`` weighting (``sigma^2`` or ``1 / weight``), else NaN."""
    if settings.weighting != Weighting.SAMPLE:
        return math.nan
    if sample.sigma is not None:
        return sample.sigma * sample.sigma
    return 1.0 / sample.weight if sample.weight is not None else math.nan


def _or_inf(elapsed: float | None) -> float:
    # The tracker takes inf for "no previous tracked sample": the new one then carries full weight.
    return math.inf if elapsed is None else elapsed


def shape_key(settings: ChannelSettings) -> tuple[object, ...]:
    return (len(settings.terms), settings.noise_half_life_in_seconds, settings.noise_robust,
            settings.noise_warmup, len(settings.noise_model_terms))
