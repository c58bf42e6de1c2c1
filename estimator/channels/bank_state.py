"""A ChannelBank's whole state out and back in, exactly: every array bit for bit, every counter and buffer.

:func:`export_state` writes the bank's :class:`~estimator.channels.channel_bank.ChannelBankState`
(made of each part's own exported state) as plain arrays (group-wise, channel axis first where there
is one, but for the two factors) and a JSON-able description; :func:`import_state` reads them back into
a bank built from a configuration, through the parts' own ``restore``. Channels are matched by id, so a
bank whose configuration gained or lost channels, or regrouped them, takes back what it still has: a
channel restores when it was saved with the same estimator shape (parameters, operating-point model
size), and starts afresh otherwise (the returned list names those). Settings (forgetting factors,
limits) are the configuration's, never the saved ones: they are not written.

Nothing here reads or writes files: the service's storage (checkpoints) does.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel_bank import ChannelBank, ChannelBankState
from estimator.channels.channel_group import GroupState, LaneState
from estimator.channels.regressors import BuilderState
from estimator.detection.baseline import SOURCES, Baseline

__all__ = ["export_state", "import_state"]

Arrays = dict[str, NDArray[Any]]
Path = tuple[str, ...]

# Each array of a group as the format names it (``g<k>.<name>``, unchanged since format 2), and where it lives
# in a GroupState. The other fields of a GroupState are settings (the configuration's), the lanes (below) or
# the baselines (below). A field that is None (no operating-point model) has no array.
_DETECTORS = ("watch", "detectors")
_FIELDS: tuple[tuple[str, Path], ...] = (
    ("bank.A", ("wls", "factor")),
    ("bank.n_eff", ("wls", "effective_count")),
    ("bank.n_eff_sq", ("wls", "effective_count_sq")),
    ("bank.count", ("wls", "sample_count")),
    ("tracker.S", ("tracker", "weighted_sum")),
    ("tracker.C", ("tracker", "weight_sum")),
    ("tracker.count", ("tracker", "sample_count")),
    ("watch.commissioned", ("watch", "commissioned")),
    ("watch.square_sum", ("watch", "square_sum")),
    ("watch.square_count", ("watch", "square_count")),
    ("watch.ratio_sum", ("watch", "ratio_sum")),
    ("watch.ratio_count", ("watch", "ratio_count")),
    ("watch.judged", ("watch", "judged")),
    ("watch.last_innovation", ("watch", "last_innovation")),
    ("watch.last_spread", ("watch", "last_spread")),
    ("det.has_baseline", (*_DETECTORS, "has_baseline")),
    ("det.sigma_ref", (*_DETECTORS, "sigma_ref")),
    ("det.theta_ref", (*_DETECTORS, "theta_ref")),
    ("det.cov_ref", (*_DETECTORS, "cov_ref")),
    ("det.state", (*_DETECTORS, "running")),
    ("det.since_drift", (*_DETECTORS, "since_drift")),
    ("det.active", (*_DETECTORS, "active")),
    ("det.conditions", (*_DETECTORS, "conditions")),
    ("det.shape_count", (*_DETECTORS, "shape_count")),
    ("det.shape", (*_DETECTORS, "shape")),
    ("model.A", ("model", "bank", "factor")),
    ("model.n_eff", ("model", "bank", "effective_count")),
    ("model.n_eff_sq", ("model", "bank", "effective_count_sq")),
    ("model.count", ("model", "bank", "sample_count")),
    ("model.fitted", ("model", "sample_count")),
    ("watch.candidate", ("watch", "candidate")),
    ("det.beta_ref", (*_DETECTORS, "beta_ref")),
)
# Arrays stored with the channel axis last (the factors, as the banks hold them); the state has it first.
_CHANNEL_LAST = frozenset({"bank.A", "model.A"})
# Arrays a state saved by an earlier version may lack: they keep their fresh value (the last two are display
# only; without its noise-shape arrays a channel calibrates its shape anew, judging no CUSUM until it has).
_ADDED_LATER = frozenset({"watch.last_innovation", "watch.last_spread", "det.shape_count", "det.shape"})


def _at(state: object, path: Path) -> Any:
    for name in path:
        if state is None:
            return None
        state = getattr(state, name)
    return state


def _group_arrays(state: GroupState) -> Arrays:
    """Every array of ``_FIELDS`` the group has, channel axis first (the state's own arrays, not copies)."""
    return {name: value for name, path in _FIELDS if (value := _at(state, path)) is not None}


def _shape(state: GroupState) -> list[int]:
    return [state.wls.factor.shape[1] - 1, 0 if state.model is None else state.model.bank.factor.shape[1] - 1]


def export_state(bank: ChannelBank) -> tuple[Arrays, dict[str, object]]:
    """Copies of every array (keys ``g<k>.<name>``) and the rest as JSON-able data.

    Per-channel scalars and baselines are arrays too, so the JSON part stays small: channel ids,
    refusal counts of the channels that have any, notes, and the lag buffers of ARX channels.
    """
    arrays: Arrays = {}
    groups = []
    for g, state in enumerate(bank.state().groups):
        for name, array in _group_arrays(state).items():
            # The state holds copies already; the factors go back to channel-last, as the format has them.
            arrays[f"g{g}.{name}"] = np.ascontiguousarray(np.moveaxis(array, 0, -1)) if name in _CHANNEL_LAST else array
        lanes = state.lanes
        arrays[f"g{g}.lane.counts"] = np.array([[lane.applied, lane.warmup] for lane in lanes], dtype=np.int64)
        nan = np.nan          # inline None -> NaN: this runs on the engine thread for every lane at a checkpoint
        arrays[f"g{g}.lane.times"] = np.array(
            [(nan if lane.last_t is None else lane.last_t, nan if lane.last_tracked_t is None else lane.last_tracked_t)
             for lane in lanes], dtype=np.float64).reshape(len(lanes), 2)
        arrays[f"g{g}.lane.seq"] = np.array([[0 if lane.last_seq is None else lane.last_seq,
                                              lane.last_seq is not None] for lane in lanes], dtype=np.int64)
        # Every builder's count and last output as arrays; the lag buffers of those that keep history, JSON too.
        simple = [[b.accepted, b.outputs[-1] if b.outputs else nan] for lane in lanes for b in lane.builders]
        arrays[f"g{g}.lane.builders"] = np.array(simple, dtype=np.float64).reshape(len(simple), 2)
        history = {str(i): [_builder_json(b) if b.keeps_history else None for b in lane.builders]
                   for i, lane in enumerate(lanes) if any(b.keeps_history for b in lane.builders)}
        refused = {str(i): dict(lane.refused) for i, lane in enumerate(lanes) if lane.refused}
        n, m = _shape(state)
        rows = [(i, b) for i, versions in enumerate(state.watch.baselines) for b in versions]
        arrays[f"g{g}.baselines.parameters"] = np.array([b.parameters for _, b in rows]).reshape(len(rows), n)
        arrays[f"g{g}.baselines.covariance"] = np.array([b.covariance for _, b in rows]).reshape(len(rows), n, n)
        arrays[f"g{g}.baselines.model"] = np.array(
            [b.noise_model if b.noise_model is not None else np.full(m, np.nan) for _, b in rows]).reshape(len(rows), m)
        arrays[f"g{g}.baselines.scalars"] = np.array(
            [[lane, b.version, SOURCES.index(b.source), b.noise_sigma, _nan(b.t), b.samples, b.noise_model is not None]
             for lane, b in rows], dtype=np.float64).reshape(len(rows), 7)
        notes = {str(k): b.note for k, (_, b) in enumerate(rows) if b.note}
        groups.append({"shape": [n, m], "channels": [lane.channel for lane in lanes],
                       "rejected": refused, "builders": history, "notes": notes})
    return arrays, {"format": 2, "groups": groups}


def _builder_json(state: BuilderState) -> dict[str, object]:
    return {"accepted": state.accepted, "outputs": list(state.outputs),
            "inputs": {name: list(values) for name, values in state.inputs.items()}}


def _nan(value: float | None) -> float:
    return np.nan if value is None else float(value)


def _none(value: float) -> float | None:
    return None if value != value else float(value)


def import_state(bank: ChannelBank, arrays: Arrays, meta: dict[str, Any]) -> list[str]:
    """Put a saved state into ``bank`` (freshly built); returns the channels that start afresh.

    Raises
    ------
    ValueError
        The saved state is not one this code wrote (unknown format, missing arrays), or one a part
        refuses (lag buffers of other lags); the bank is left as it was.
    KeyError
        The description lacks an entry this code writes.
    """
    if meta.get("format") != 2:
        raise ValueError(f"unknown bank state format {meta.get('format')!r}")
    saved: dict[str, tuple[int, int]] = {}
    for g, info in enumerate(meta["groups"]):
        for i, channel in enumerate(info["channels"]):
            saved[channel] = (g, i)
    fresh: list[str] = []
    merged: list[GroupState] = []
    for current in bank.state().groups:
        by_source: dict[int, tuple[list[int], list[int]]] = {}
        for index, lane in enumerate(current.lanes):
            where = saved.get(lane.channel)
            if where is None or meta["groups"][where[0]]["shape"] != _shape(current):
                fresh.append(lane.channel)
                continue
            rows = by_source.setdefault(where[0], ([], []))
            rows[0].append(index)
            rows[1].append(where[1])
        merged.append(_merged(current, by_source, arrays, meta))
    bank.restore(ChannelBankState(tuple(merged)))
    return fresh


def _merged(current: GroupState, by_source: dict[int, tuple[list[int], list[int]]], arrays: Arrays,
            meta: dict[str, Any]) -> GroupState:
    """``current`` with the saved rows of its channels in place of its own (source group -> (mine, theirs))."""
    targets = {name: array.copy() for name, array in _group_arrays(current).items()}
    lanes = list(current.lanes)
    baselines = list(current.watch.baselines)
    for g, (mine, theirs) in by_source.items():
        dst, src = np.array(mine, dtype=np.intp), np.array(theirs, dtype=np.intp)
        for name, target in targets.items():
            key = f"g{g}.{name}"
            if key not in arrays:
                if name in _ADDED_LATER:
                    continue
                raise ValueError(f"saved state lacks {key}")
            source = arrays[key]
            if name in _CHANNEL_LAST:
                source = np.moveaxis(source, -1, 0)
            if name == "det.state" and source.shape[1] < target.shape[1]:
                # Saved before the state gained columns (the previous normal score): those start empty.
                source = np.concatenate([source, np.full((source.shape[0], target.shape[1] - source.shape[1]),
                                                         np.nan)], axis=1)
            target[dst] = source[src]
        info = meta["groups"][g]
        to_lane = dict(zip(theirs, mine, strict=True))
        for saved_index, lane_index in to_lane.items():
            lanes[lane_index] = _saved_lane(current.lanes[lane_index], info, arrays, g, saved_index)
        for lane_index, versions in _saved_baselines(info, arrays, g, to_lane).items():
            baselines[lane_index] = versions
    changes: dict[Path, object] = {path: targets[name] for name, path in _FIELDS if name in targets}
    changes[("lanes",)] = tuple(lanes)
    changes[("watch", "baselines")] = tuple(baselines)
    result: GroupState = _replaced(current, changes)
    return result


def _replaced(state: Any, changes: dict[Path, object]) -> Any:
    """A copy of the (nested, frozen) dataclass ``state`` with the fields at the given paths replaced."""
    direct = {path[0]: value for path, value in changes.items() if len(path) == 1}
    deeper: dict[str, dict[Path, object]] = {}
    for path, value in changes.items():
        if len(path) > 1:
            deeper.setdefault(path[0], {})[path[1:]] = value
    for name, inner in deeper.items():
        direct[name] = _replaced(getattr(state, name), inner)
    return dataclasses.replace(state, **direct)


def _saved_lane(current: LaneState, info: dict[str, Any], arrays: Arrays, g: int, saved_index: int) -> LaneState:
    """The lane state saved at ``saved_index`` of group ``g``, for the lane whose fresh state is ``current``."""
    applied, warmup = (int(v) for v in arrays[f"g{g}.lane.counts"][saved_index])
    last_t, last_tracked_t = (_none(float(v)) for v in arrays[f"g{g}.lane.times"][saved_index])
    seq = arrays[f"g{g}.lane.seq"][saved_index]
    simple = arrays[f"g{g}.lane.builders"]
    width = len(current.builders)                    # the same for every lane of a group
    full = info["builders"].get(str(saved_index))
    builders = []
    for k, fresh in enumerate(current.builders):
        if full is not None and full[k] is not None:
            given = full[k]
            builders.append(BuilderState(int(given["accepted"]), tuple(given["outputs"]),
                                         {name: tuple(values) for name, values in given["inputs"].items()},
                                         fresh.keeps_history))
        elif fresh.keeps_history:
            raise ValueError(f"saved state of channel {current.channel!r} has no lag history for builder {k}")
        else:
            accepted, last_output = simple[saved_index * width + k]
            builders.append(BuilderState(int(accepted), () if math.isnan(last_output) else (float(last_output),),
                                         {}, False))
    refused = {str(k): int(v) for k, v in info["rejected"].get(str(saved_index), {}).items()}
    return LaneState(current.channel, applied, warmup, refused, last_t, int(seq[0]) if seq[1] else None,
                     last_tracked_t, tuple(builders))


def _saved_baselines(info: dict[str, Any], arrays: Arrays, g: int, to_lane: dict[int, int]
                     ) -> dict[int, tuple[Baseline, ...]]:
    """Each restored lane's saved baselines, oldest first (none for a lane saved without any)."""
    params = arrays[f"g{g}.baselines.parameters"]
    covs = arrays[f"g{g}.baselines.covariance"]
    betas = arrays[f"g{g}.baselines.model"]
    scalars = arrays[f"g{g}.baselines.scalars"]
    found: dict[int, list[Baseline]] = {lane: [] for lane in to_lane.values()}
    for row in range(scalars.shape[0]):
        lane, version, source, sigma, t, samples, has_model = scalars[row]
        owner = to_lane.get(int(lane))
        if owner is None:
            continue
        found[owner].append(Baseline(
            int(version), SOURCES[int(source)], params[row], covs[row], float(sigma),
            betas[row] if has_model else None, _none(float(t)), int(samples), info["notes"].get(str(row), "")))
    return {lane: tuple(versions) for lane, versions in found.items()}
