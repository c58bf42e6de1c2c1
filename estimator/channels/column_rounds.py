"""Whole columns of many channels through one group's estimators, vectorised across channels.

The exact path (:meth:`ChannelBank.apply`) prepares every sample as a Python
object: checks, regressor row, weight. Here a group's columns become flat
arrays once per micro-batch, and everything that does not depend on the
recursion is done for all samples at once:

1. every check of :func:`estimator.channels.channel.check_sample`, as whole-array
   comparisons (time and sequence numbers against the previous sample of the
   same channel, or the channel's last accepted one for the first);
2. regressor rows by :meth:`RegressorSpec.block` per term list (lag buffers
   prefixed for ARX terms), fixed weights and application rules.

A channel whose columns would meet any refusal is not touched here: it goes
whole to the exact path, which finds the reasons. The others run in rounds,
round r taking the r-th fitted sample of every channel that has one, through
the same vectorised steps as the exact path (weights from the tracker state
before the sample; update; tracker; operating-point model; detectors). Small work is
left to the exact path, which is as fast there: a group with fewer than
``column_min_samples`` samples or ``vector_min`` channels, and the last
rounds once fewer than ``vector_min`` channels still have samples (``PathTuning``, a channel setting).
Elementwise IEEE
arithmetic does not depend on the vector it runs in, so the result is the
exact path's, bit for bit; a property test holds the two to that. Should a
tracked weight turn out unusable mid-way, that channel leaves the rounds at
that sample and its remaining samples go to the exact path.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import chain
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel import Weighting
from estimator.channels.sample_columns import AppliedRows, ColumnsOutcome, SampleColumns
from estimator.recursive.weight_rule import usable_sigmas, usable_weights

if TYPE_CHECKING:
    from estimator.channels.channel_group import ChannelGroup, Lane

__all__ = ["apply_group_columns"]

FloatArray = NDArray[np.float64]


Leftover = tuple["Lane", SampleColumns, int]       # lane, its columns, first position for the exact path


def _flat(lists: Sequence[Sequence[float | None]]) -> FloatArray:
    return np.array(list(chain.from_iterable(lists)), dtype=np.float64)   # None becomes NaN


def _per_lane_any(mask: NDArray[np.bool_], starts: NDArray[np.intp]) -> NDArray[np.bool_]:
    return np.logical_or.reduceat(mask, starts) if mask.shape[0] else np.zeros(starts.shape[0], dtype=bool)


def _per_lane_count(mask: NDArray[np.bool_], starts: NDArray[np.intp]) -> NDArray[np.intp]:
    return np.add.reduceat(mask.astype(np.intp), starts) if mask.shape[0] else np.zeros(starts.shape[0], np.intp)


class _Optional:
    """A float field that may be absent: per lane all present, all absent, or refused (mixed, or NaN given)."""

    def __init__(self, lists: Sequence[list[float | None]], lengths: NDArray[np.intp],
                 starts: NDArray[np.intp]) -> None:
        self.values = _flat(lists)
        nones = np.array([values.count(None) for values in lists], dtype=np.intp)
        nans = _per_lane_count(np.isnan(self.values), starts)
        self.present = nones == 0                              # per lane
        self.refused = (nans != nones) | ((nones != 0) & (nones != lengths))
        self.given = ~np.isnan(self.values)                     # per sample, where not refused


class _Prepared:
    """Flat arrays of one group's micro-batch and the lanes that may run in rounds."""

    def __init__(self, group: ChannelGroup, entries: list[tuple[Lane, SampleColumns]]) -> None:
        # Lanes with the same term lists side by side: one regressor block per term list.
        entries = sorted(entries, key=lambda e: e[0].terms_key)
        self.entries = entries
        lanes = [lane for lane, _ in entries]
        columns = [c for _, c in entries]
        self.lanes = lanes
        count = len(lanes)
        self.lengths = lengths = np.array([len(c.y) for c in columns], dtype=np.intp)
        self.starts = starts = np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.intp)
        total = int(lengths.sum())
        self.lane_of = lane_of = np.repeat(np.arange(count), lengths)
        first = np.zeros(total, dtype=bool)
        first[starts] = True

        self.y = _flat([c.y for c in columns])
        bad = ~np.isfinite(self.y)

        # Sequence numbers first, as check_sample orders them: all present or all absent per lane.
        seq_nones = np.array([c.seq.count(None) for c in columns], dtype=np.intp)
        self.seq_present = seq_nones == 0
        refused = (seq_nones != 0) & (seq_nones != lengths)
        seq_lists = [c.seq if p else [-1] * len(c) for c, p in zip(columns, self.seq_present, strict=True)]
        flat_seq = list(chain.from_iterable(seq_lists))
        if not set(map(type, flat_seq)) <= {int}:
            raise TypeError("seq must be int")             # numpy would truncate a float: the exact path decides
        self.seq = np.array(flat_seq, dtype=np.int64)
        last_seq = np.array([-1 if lane.last_seq is None else lane.last_seq for lane in lanes], dtype=np.int64)
        previous = np.empty_like(self.seq)
        previous[1:] = self.seq[:-1]
        previous[starts] = last_seq
        # A seq <= the previous one is refused; a first seq below 0 with no last_seq is left to the exact path.
        bad |= self.seq_present[lane_of] & (self.seq <= previous)

        self.sigma = _Optional([c.sigma for c in columns], lengths, starts)
        self.weight = _Optional([c.weight for c in columns], lengths, starts)
        self.t = _Optional([c.t for c in columns], lengths, starts)
        refused |= self.sigma.refused | self.weight.refused | self.t.refused
        bad |= self.sigma.given & ~usable_sigmas(self.sigma.values)         # non_finite, bad_sigma
        bad |= self.weight.given & ~usable_weights(self.weight.values)      # non_finite, bad_weight
        t = self.t.values
        last_t = np.array([np.nan if lane.last_t is None else lane.last_t for lane in lanes])
        previous_t = np.empty_like(t)
        previous_t[1:] = t[:-1]
        previous_t[starts] = last_t
        with np.errstate(invalid="ignore"):
            bad |= self.t.given & ~np.isfinite(t)
            later = t > previous_t
        bad |= self.t.given & ~later & ~(first & np.isnan(previous_t))
        if group.time_based:
            refused |= ~self.t.present                        # missing_time

        # Inputs: every input the channel reads, in every sample; other inputs must be finite.
        for k, (lane, c) in enumerate(entries):
            names = lane.input_name_set
            if not c.inputs.keys() >= names or any(None in v for v in c.inputs.values()):
                refused[k] = True
            elif len(c.inputs) != len(names):
                extra = [v for name, v in c.inputs.items() if name not in names]
                if not all(np.isfinite(np.array(v, dtype=np.float64)).all() for v in extra):
                    refused[k] = True
        self.refused = refused | _per_lane_any(bad, starts)
        self._regressors(group, entries)
        self._weights(entries)

    def _segment(self, k: int) -> slice:
        start = int(self.starts[k])
        return slice(start, start + int(self.lengths[k]))

    def _regressors(self, group: ChannelGroup, entries: list[tuple[Lane, SampleColumns]]) -> None:
        """Z (N, n), Z_op (N, m) and the warm-up rows (lags not filled) of each lane."""
        total = self.y.shape[0]
        n = group.wls.n_params
        m = group.model.n_terms if group.model is not None else 0
        self.Z = np.zeros((total, n))
        self.Z_op = np.zeros((total, m)) if m else None
        self.warmup = np.zeros(len(entries), dtype=np.intp)
        k = 0
        while k < len(entries):
            lane = entries[k][0]
            end = k + 1
            while end < len(entries) and entries[end][0].terms_key == lane.terms_key:
                end += 1
            usable_from = max(lane.builder.spec.warmup,
                              lane.noise_builder.spec.warmup if lane.noise_builder is not None else 0)
            members = [j for j in range(k, end) if not self.refused[j]]
            if members and usable_from == 0:
                self._rows_of(lane, members, fill_warmup=False)
            else:
                for j in members:
                    self._rows_of(entries[j][0], [j], fill_warmup=True)
            k = end
        fitted = np.arange(total) - self.starts[self.lane_of] >= self.warmup[self.lane_of]
        self.fitted = fitted
        finite = np.isfinite(self.Z).all(axis=1)
        if self.Z_op is not None:
            finite &= np.isfinite(self.Z_op).all(axis=1)
        self.refused |= _per_lane_any(fitted & ~finite, self.starts)

    def _rows_of(self, lane: Lane, members: list[int], *, fill_warmup: bool) -> None:
        """Regressor rows of lanes that share ``lane``'s term lists (one lane when its terms have lags)."""
        chosen = np.zeros(len(self.entries), dtype=bool)
        chosen[members] = True
        rows = np.flatnonzero(chosen[self.lane_of])
        inputs = {name: _flat([self.entries[j][1].inputs[name] for j in members])
                  for name in lane.settings.input_names}
        if inputs:
            finite = np.logical_and.reduce([np.isfinite(v) for v in inputs.values()])
            if not finite.all():                                            # non_finite input
                self.refused[np.unique(self.lane_of[rows[~finite]])] = True
        y = self.y[rows]
        with np.errstate(over="ignore", invalid="ignore"):               # overflow: inf, refused below
            if fill_warmup:
                self.Z[rows], usable = lane.builder.rows(inputs, y)
            else:
                self.Z[rows], usable = lane.builder.spec.block(inputs, y)
            if self.Z_op is not None and lane.noise_builder is not None:
                if fill_warmup:
                    self.Z_op[rows], usable_op = lane.noise_builder.rows(inputs, y)
                    usable = usable & usable_op
                else:
                    self.Z_op[rows], _ = lane.noise_builder.spec.block(inputs, y)
        if fill_warmup:
            self.warmup[members[0]] = int(np.count_nonzero(~usable))

    def _weights(self, entries: list[tuple[Lane, SampleColumns]]) -> None:
        """Fixed weights (unit, sample) for every sample; tracked lanes get theirs per round."""
        total = self.y.shape[0]
        count = len(entries)
        weighting = [lane.settings.weighting for lane, _ in entries]
        self.tracked = np.array([w == Weighting.TRACKED for w in weighting], dtype=bool)
        self.initial_variance = np.array([lane.settings.initial_sigma ** 2 for lane, _ in entries])
        w = np.ones(total)
        sample_lanes = np.array([x == Weighting.SAMPLE for x in weighting], dtype=bool)
        self.declared = np.full(total, np.nan)          # declared_variance() of each sample
        if sample_lanes.any():
            on = sample_lanes[self.lane_of]
            s = self.sigma.values
            with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
                from_sigma = 1.0 / (s * s)
            w = np.where(on & self.sigma.given, from_sigma, np.where(on, self.weight.values, w))
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                self.declared = np.where(on & self.sigma.given, s * s,
                                         np.where(on & self.weight.given, 1.0 / self.weight.values, np.nan))
            missing = on & ~self.sigma.given & ~self.weight.given          # missing_weight
            self.refused |= _per_lane_any(missing, self.starts)
        # Application rules, padded to the longest list (an absent rule is never in band).
        rules = max((len(lane.settings.weight_rules) for lane, _ in entries), default=0)
        self.rules = rules
        self.in_band = np.zeros((total, rules), dtype=bool)
        self.factor = np.ones((count, rules))
        for k, (lane, columns) in enumerate(entries):
            if self.refused[k] or not lane.settings.weight_rules:
                continue
            seg = self._segment(k)
            for q, rule in enumerate(lane.settings.weight_rules):
                x = np.array(columns.inputs[rule.input], dtype=np.float64)
                self.in_band[seg, q] = (rule.low <= x) & (x <= rule.high)
                self.factor[k, q] = rule.factor
        w = self.apply_rules(w, np.arange(total), self.lane_of)
        fixed = ~self.tracked[self.lane_of]
        unusable = fixed & self.fitted & ~usable_weights(w)                             # bad_weight
        self.refused |= _per_lane_any(unusable, self.starts)
        self.w = w
        self.w_used = w.copy()          # the weight each update used (tracked ones are made per round)

    def apply_rules(self, w: FloatArray, rows: NDArray[np.intp], lanes: NDArray[np.intp]) -> FloatArray:
        """``w = w * factor`` for each rule in band, rule by rule as ``sample_weight`` does."""
        with np.errstate(over="ignore"):
            for q in range(self.rules):
                w = np.where(self.in_band[rows, q], w * self.factor[lanes, q], w)
        return w


def apply_group_columns(group: ChannelGroup, entries: list[tuple[Lane, SampleColumns]], keep_rows: bool = False
                        ) -> tuple[dict[str, ColumnsOutcome], list[Leftover]]:
    """Apply the columns of distinct lanes of ``group``; return their outcomes and what the exact path must do.

    Lanes whose columns meet a refusal come back whole as leftovers (start 0),
    and a lane that stops mid-way comes back from the sample where it stopped.
    With ``keep_rows`` each outcome carries its fitted samples (:class:`AppliedRows`).
    """
    entries = [(lane, c) for lane, c in entries if c.y]
    tuning = group.tuning
    if len(entries) < tuning.vector_min or sum(len(c.y) for _, c in entries) < tuning.column_min_samples:
        return {}, [(lane, c, 0) for lane, c in entries]
    try:
        prep = _Prepared(group, entries)
    except (TypeError, ValueError, OverflowError):
        return {}, [(lane, c, 0) for lane, c in entries]      # values numpy cannot hold: the exact path decides
    outcomes: dict[str, ColumnsOutcome] = {}
    leftovers: list[Leftover] = [(lane, c, 0) for k, (lane, c) in enumerate(prep.entries) if prep.refused[k]]
    runnable = np.flatnonzero(~prep.refused)
    if runnable.shape[0] == 0:
        return outcomes, leftovers
    done = _run_rounds(group, prep, runnable)
    lanes = runnable.tolist()
    fitted = done.tolist()
    accepted = (prep.warmup[runnable] + done).tolist()
    for k, outcome, count in zip(lanes, _finish_lanes(prep, lanes, accepted, fitted), accepted, strict=True):
        lane, columns = prep.entries[k]
        if keep_rows:
            first = int(prep.warmup[k])
            rows = slice(int(prep.starts[k]) + first, int(prep.starts[k]) + first + outcome.applied)
            outcome.rows = AppliedRows(np.arange(first, first + outcome.applied, dtype=np.intp),
                                       prep.Z[rows].copy(), prep.y[rows].copy(), prep.w_used[rows].copy())
        outcomes[lane.channel] = outcome
        if count < len(columns.y):
            leftovers.append((lane, columns, count))
    return outcomes, leftovers


def _run_rounds(group: ChannelGroup, prep: _Prepared, runnable: NDArray[np.intp]) -> NDArray[np.intp]:
    """The recursion, round by round; returns how many samples each runnable lane fitted."""
    fit_start = prep.starts[runnable] + prep.warmup[runnable]
    fit_count = prep.lengths[runnable] - prep.warmup[runnable]
    order = np.argsort(-fit_count, kind="stable")          # longest first: round r's lanes are a prefix
    lanes = runnable[order]
    fit_start = fit_start[order]
    fit_count = fit_count[order]
    bank_index = np.array([prep.lanes[k].index for k in lanes.tolist()], dtype=np.intp)
    tracked = prep.tracked[lanes]
    any_tracked = bool(tracked.any())
    last_tracked = np.array([np.nan if prep.lanes[k].last_tracked_t is None else prep.lanes[k].last_tracked_t
                             for k in lanes.tolist()])
    done = fit_count.copy()
    alive = np.ones(lanes.shape[0], dtype=bool)
    rounds = int(fit_count[0]) if fit_count.shape[0] else 0
    active = np.searchsorted(-fit_count, -np.arange(rounds), side="left")    # lanes with more than r to fit
    all_alive = True
    for r in range(rounds):
        if active[r] < group.tuning.vector_min:     # the few lanes still going: the exact path's scalar steps
            narrow = np.arange(int(active[r]))
            narrow = narrow[alive[narrow]]
            done[narrow] = r
            break
        sel = np.arange(int(active[r]))
        if not all_alive:
            sel = sel[alive[sel]]
            if sel.shape[0] == 0:
                break
        rows = fit_start[sel] + r
        idx = bank_index[sel]
        z = prep.Z[rows]
        y = prep.y[rows]
        w = prep.w[rows]
        if any_tracked:
            w, usable = _tracked_weights(group, prep, w, rows, lanes[sel], tracked[sel], idx)
            if not usable.all():
                stopped = sel[~usable]
                alive[stopped] = False
                done[stopped] = r
                all_alive = False
                sel, rows, idx = sel[usable], rows[usable], idx[usable]
                z, y, w = z[usable], y[usable], w[usable]
                if sel.shape[0] == 0:
                    continue
        if any_tracked:
            prep.w_used[rows] = w
        z_op = prep.Z_op[rows] if prep.Z_op is not None else None
        declared = prep.declared[rows]
        kappa = group.wls.kappa(idx)
        result = group.wls.update_trusted(z, y, w, idx)
        elapsed = None
        if group.time_based:
            elapsed = prep.t.values[rows] - last_tracked[sel]
            elapsed[np.isnan(elapsed)] = np.inf            # no earlier tracked sample
        used = group.tracker.update_trusted(idx, result.innovation, result.leverage, kappa, elapsed)
        if group.model is not None and z_op is not None:
            group.model.update_trusted(idx, z_op, result.innovation, result.leverage, kappa)
        t = prep.t.values[rows]
        last_tracked[sel] = np.where(used & ~np.isnan(t), t, last_tracked[sel])
        group.watch.after_round(idx, t, result.innovation, result.leverage, kappa, declared, z_op)
    for k, value in zip(lanes.tolist(), last_tracked.tolist(), strict=True):
        prep.lanes[k].last_tracked_t = None if value != value else value
    result_done = np.empty_like(done)
    result_done[order] = done
    return result_done


def _tracked_weights(group: ChannelGroup, prep: _Prepared, w: FloatArray, rows: NDArray[np.intp],
                     lanes: NDArray[np.intp], tracked: NDArray[np.bool_], idx: NDArray[np.intp]
                     ) -> tuple[FloatArray, NDArray[np.bool_]]:
    """Weights ``1 / sigma_hat^2`` from the state before this round (``sample_weight``), then the rules."""
    if not tracked.any():
        return w, np.ones(w.shape[0], dtype=bool)
    t_idx = idx[tracked]
    variance = group.tracker.variance_of(t_idx)
    if group.model is not None and prep.Z_op is not None:
        predicted = group.model.variance(t_idx, prep.Z_op[rows[tracked]])
        variance = np.where(np.isfinite(predicted), predicted, variance)
    with np.errstate(invalid="ignore"):
        fallback = ~(np.isfinite(variance) & (variance > 0.0))
    variance = np.where(fallback, prep.initial_variance[lanes[tracked]], variance)
    with np.errstate(divide="ignore"):
        tracked_w = 1.0 / variance
    tracked_w = prep.apply_rules(tracked_w, rows[tracked], lanes[tracked])
    w = w.copy()
    w[tracked] = tracked_w
    return w, usable_weights(w)


def _finish_lanes(prep: _Prepared, lanes: list[int], accepted: list[int], fitted: list[int]
                  ) -> list[ColumnsOutcome]:
    """Lag buffers, ordering and counters of each lane after its first ``accepted`` samples."""
    k = np.array(lanes, dtype=np.intp)
    last = prep.starts[k] + np.maximum(np.array(accepted, dtype=np.intp), 1) - 1
    last_t = prep.t.values[last].tolist()
    last_seq = prep.seq[last].tolist()
    last_y = prep.y[last].tolist()
    t_present = prep.t.present[k].tolist()
    seq_present = prep.seq_present[k].tolist()
    warmups = prep.warmup[k].tolist()
    outcomes = []
    for j, lane_k in enumerate(lanes):
        lane, columns = prep.entries[lane_k]
        count = accepted[j]
        if count:
            for builder in lane.builders:
                if builder.keeps_history:
                    start = int(prep.starts[lane_k])
                    arrays = {name: np.array(columns.inputs[name][:count], dtype=np.float64)
                              for name in builder.lagged_inputs}
                    builder.push_many(arrays, prep.y[start:start + count])
                else:
                    builder.push_count(count, last_y[j])
            if t_present[j]:
                lane.last_t = last_t[j]
            if seq_present[j]:
                lane.last_seq = last_seq[j]
        lane.counters.applied += fitted[j]
        lane.counters.warmup += warmups[j]
        outcomes.append(ColumnsOutcome(applied=fitted[j], warmup=warmups[j],
                                       last_applied=warmups[j] + fitted[j] - 1 if fitted[j] else None))
    return outcomes
