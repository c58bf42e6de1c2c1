"""A ChannelBank's whole state out and back in, exactly: every array bit for bit, every counter and buffer.

:func:`export_state` gives plain arrays (group-wise, channel axis first where
there is one) and a JSON-able description; :func:`import_state` puts them
into a bank built from a configuration. Channels are matched by id, so a
bank whose configuration gained or lost channels, or regrouped them, takes
back what it still has: a channel restores when it was saved with the same
estimator shape (parameters, operating-point model size), and starts afresh
otherwise (the returned list names those). Settings (forgetting factors,
limits) are the configuration's, never the saved ones.

Nothing here reads or writes files: the service's storage (checkpoints) does.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from estimator.detection.baseline import Baseline

if TYPE_CHECKING:
    from estimator.channels.channel_bank import ChannelBank
    from estimator.channels.channel_group import _Group

__all__ = ["export_state", "import_state"]

Arrays = dict[str, NDArray[Any]]

# Arrays whose channel axis is the last one (the factors, structure of arrays); the others have it first.
_CHANNEL_LAST = ("bank.A", "model.A")
# Arrays a state saved by an earlier version may lack: they keep their fresh value (the last two are display
# only; without its noise-shape arrays a channel calibrates its shape anew, judging no CUSUM until it has).
_ADDED_LATER = frozenset({"watch.last_innovation", "watch.last_spread", "det.shape_count", "det.shape"})


def _group_arrays(group: _Group) -> Arrays:
    bank, tracker, watch, det = group.bank, group.tracker, group.watch, group.watch.detectors
    arrays: Arrays = {
        "bank.A": bank._A, "bank.n_eff": bank._n_eff, "bank.n_eff_sq": bank._n_eff_sq, "bank.count": bank._count,
        "tracker.S": tracker._S, "tracker.C": tracker._C, "tracker.count": tracker._count,
        "watch.commissioned": watch.commissioned, "watch.square_sum": watch._square_sum,
        "watch.square_count": watch._square_count, "watch.ratio_sum": watch._ratio_sum,
        "watch.ratio_count": watch._ratio_count, "watch.judged": watch._judged,
        "watch.last_innovation": watch.last_innovation, "watch.last_spread": watch.last_spread,
        "det.has_baseline": det.has_baseline, "det.sigma_ref": det._sigma_ref, "det.theta_ref": det._theta_ref,
        "det.cov_ref": det._cov_ref, "det.state": det._state, "det.since_drift": det._since_drift,
        "det.active": det._active.T, "det.conditions": det._conditions.transpose(1, 0, 2),
        "det.shape_count": det._shape_count, "det.shape": det._shape,
    }
    if group.model is not None:
        model_bank = group.model._bank
        arrays.update({"model.A": model_bank._A, "model.n_eff": model_bank._n_eff,
                       "model.n_eff_sq": model_bank._n_eff_sq, "model.count": model_bank._count,
                       "model.fitted": group.model._count})
        if watch._candidate is not None:
            arrays["watch.candidate"] = watch._candidate
        if det._beta_ref is not None:
            arrays["det.beta_ref"] = det._beta_ref
    return arrays


def _shape(group: _Group) -> list[int]:
    return [group.bank.n_params, group.model.n_terms if group.model is not None else 0]


_SOURCES = ("learned", "fit", "engineer")


def export_state(bank: ChannelBank) -> tuple[Arrays, dict[str, object]]:
    """Copies of every array (keys ``g<k>.<name>``) and the rest as JSON-able data.

    Per-channel scalars and baselines are arrays too, so the JSON part stays small: channel ids,
    refusal counts of the channels that have any, notes, and the lag buffers of ARX channels.
    """
    arrays: Arrays = {}
    groups = []
    for g, group in enumerate(bank._groups):
        for name, array in _group_arrays(group).items():
            arrays[f"g{g}.{name}"] = np.array(array, copy=True)
        lanes = group.lanes
        arrays[f"g{g}.lane.counts"] = np.array([[lane.counters.applied, lane.counters.warmup] for lane in lanes],
                                               dtype=np.int64)
        nan = np.nan          # inline None -> NaN: this runs on the engine thread for every lane at a checkpoint
        arrays[f"g{g}.lane.times"] = np.array(
            [(nan if lane.last_t is None else lane.last_t, nan if lane.last_tracked_t is None else lane.last_tracked_t)
             for lane in lanes], dtype=np.float64).reshape(len(lanes), 2)
        arrays[f"g{g}.lane.seq"] = np.array([[0 if lane.last_seq is None else lane.last_seq,
                                              lane.last_seq is not None] for lane in lanes], dtype=np.int64)
        # Builders without lag history keep only a count and the last output: arrays; the others, JSON.
        simple = [[b.accepted, b.last_output] for lane in lanes for b in lane.builders]
        arrays[f"g{g}.lane.builders"] = np.array(simple, dtype=np.float64).reshape(len(simple), 2)
        history = {str(i): [b.state() if b.keeps_history else None for b in lane.builders]
                   for i, lane in enumerate(lanes) if any(b.keeps_history for b in lane.builders)}
        rejected = {str(i): lane.counters.rejected for i, lane in enumerate(lanes) if lane.counters.rejected}
        n, m = _shape(group)
        rows = [(lane.index, b) for lane in lanes for b in group.watch.histories[lane.index].versions]
        arrays[f"g{g}.baselines.parameters"] = np.array([b.parameters for _, b in rows]).reshape(len(rows), n)
        arrays[f"g{g}.baselines.covariance"] = np.array([b.covariance for _, b in rows]).reshape(len(rows), n, n)
        arrays[f"g{g}.baselines.model"] = np.array(
            [b.noise_model if b.noise_model is not None else np.full(m, np.nan) for _, b in rows]).reshape(len(rows), m)
        arrays[f"g{g}.baselines.scalars"] = np.array(
            [[lane, b.version, _SOURCES.index(b.source), b.noise_sigma, _nan(b.t), b.samples, b.noise_model is not None]
             for lane, b in rows], dtype=np.float64).reshape(len(rows), 7)
        notes = {str(k): b.note for k, (_, b) in enumerate(rows) if b.note}
        groups.append({"shape": _shape(group), "channels": [lane.channel for lane in lanes],
                       "rejected": rejected, "builders": history, "notes": notes})
    return arrays, {"format": 2, "groups": groups}


def _nan(value: float | None) -> float:
    return np.nan if value is None else float(value)


def _none(value: float) -> float | None:
    return None if value != value else float(value)


def import_state(bank: ChannelBank, arrays: Arrays, meta: dict[str, Any]) -> list[str]:
    """Put a saved state into ``bank`` (freshly built); returns the channels that start afresh.

    Raises
    ------
    ValueError
        The saved state is not one this code wrote (unknown format, missing arrays).
    """
    if meta.get("format") != 2:
        raise ValueError(f"unknown bank state format {meta.get('format')!r}")
    saved: dict[str, tuple[int, int]] = {}
    for g, info in enumerate(meta["groups"]):
        for i, channel in enumerate(info["channels"]):
            saved[channel] = (g, i)
    fresh: list[str] = []
    for group in bank._groups:
        targets = _group_arrays(group)
        by_source: dict[int, tuple[list[int], list[int]]] = {}
        for lane in group.lanes:
            where = saved.get(lane.channel)
            if where is None or meta["groups"][where[0]]["shape"] != _shape(group):
                fresh.append(lane.channel)
                continue
            rows = by_source.setdefault(where[0], ([], []))
            rows[0].append(lane.index)
            rows[1].append(where[1])
        for g, (mine, theirs) in by_source.items():
            dst, src = np.array(mine, dtype=np.intp), np.array(theirs, dtype=np.intp)
            for name, target in targets.items():
                key = f"g{g}.{name}"
                if key not in arrays:
                    if name in _ADDED_LATER:
                        continue
                    raise ValueError(f"saved state lacks {key}")
                source = arrays[key]
                if name == "det.state" and source.shape[1] < target.shape[1]:
                    # Saved before the state gained columns (the previous normal score): those start empty.
                    source = np.concatenate([source, np.full((source.shape[0], target.shape[1] - source.shape[1]),
                                                             np.nan)], axis=1)
                if name in _CHANNEL_LAST:
                    target[..., dst] = source[..., src]
                else:
                    target[dst] = source[src]
            _restore_lanes(group, meta["groups"][g], arrays, g, dict(zip(theirs, mine, strict=True)))
        group.watch.detectors.repack()
    return fresh


def _restore_lanes(group: _Group, info: dict[str, Any], arrays: Arrays, g: int, to_lane: dict[int, int]) -> None:
    counts, times, seqs = arrays[f"g{g}.lane.counts"], arrays[f"g{g}.lane.times"], arrays[f"g{g}.lane.seq"]
    simple = arrays[f"g{g}.lane.builders"]
    width = len(group.lanes[0].builders)              # the same for every lane of a group
    for saved_index, lane_index in to_lane.items():
        lane = group.lanes[lane_index]
        lane.counters.applied, lane.counters.warmup = (int(v) for v in counts[saved_index])
        lane.counters.rejected = {str(k): int(v) for k, v in info["rejected"].get(str(saved_index), {}).items()}
        lane.last_t, lane.last_tracked_t = (_none(float(v)) for v in times[saved_index])
        lane.last_seq = int(seqs[saved_index, 0]) if seqs[saved_index, 1] else None
        full = info["builders"].get(str(saved_index))
        for k, builder in enumerate(lane.builders):
            if full is not None and full[k] is not None:
                builder.restore(full[k])
            else:
                accepted, last_output = simple[saved_index * width + k]
                builder.restore_simple(int(accepted), _none(float(last_output)))
        group.watch.histories[lane_index].versions.clear()
    params = arrays[f"g{g}.baselines.parameters"]
    covs = arrays[f"g{g}.baselines.covariance"]
    betas = arrays[f"g{g}.baselines.model"]
    scalars = arrays[f"g{g}.baselines.scalars"]
    for row in range(scalars.shape[0]):
        lane, version, source, sigma, t, samples, has_model = scalars[row]
        owner = to_lane.get(int(lane))
        if owner is None:
            continue
        group.watch.histories[owner].add(Baseline(
            int(version), _SOURCES[int(source)], params[row], covs[row], float(sigma),
            betas[row] if has_model else None, _none(float(t)), int(samples), info["notes"].get(str(row), "")))
