"""A ChannelBank's whole state out and back in, exactly: every array bit for bit, every counter and buffer.

:func:`export_state` gives plain arrays (group-wise, channel axis first where
there is one) and a JSON-able description; :func:`import_state` puts them
into a bank built from a configuration. Channels are matched by id, so a
bank whose configuration gained or lost channels, or regrouped them, takes
back what it still has: a channel restores when it was saved with the same
estimator shape (parameters, operating-point model size), and starts afresh
otherwise (the returned list names those). Settings (forgetting factors,
limits) are the configuration's, never the saved ones.

Nothing here reads or writes files: :mod:`service.checkpoint` does.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from estimator.baseline import Baseline

if TYPE_CHECKING:
    from estimator.channel_bank import ChannelBank
    from estimator.channel_group import _Group

__all__ = ["export_state", "import_state"]

Arrays = dict[str, NDArray[Any]]

# Arrays whose channel axis is the last one (the factors, structure of arrays); the others have it first.
_CHANNEL_LAST = ("bank.A", "model.A")


def _group_arrays(group: _Group) -> Arrays:
    bank, tracker, watch, det = group.bank, group.tracker, group.watch, group.watch.detectors
    arrays: Arrays = {
        "bank.A": bank._A, "bank.n_eff": bank._n_eff, "bank.n_eff_sq": bank._n_eff_sq, "bank.count": bank._count,
        "tracker.S": tracker._S, "tracker.C": tracker._C, "tracker.count": tracker._count,
        "watch.commissioned": watch.commissioned, "watch.square_sum": watch._square_sum,
        "watch.square_count": watch._square_count, "watch.ratio_sum": watch._ratio_sum,
        "watch.ratio_count": watch._ratio_count, "watch.judged": watch._judged,
        "det.has_baseline": det.has_baseline, "det.sigma_ref": det._sigma_ref, "det.theta_ref": det._theta_ref,
        "det.cov_ref": det._cov_ref, "det.state": det._state, "det.since_drift": det._since_drift,
        "det.active": det._active.T, "det.conditions": det._conditions.transpose(1, 0, 2),
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


def export_state(bank: ChannelBank) -> tuple[Arrays, dict[str, object]]:
    """Copies of every array (keys ``g<k>.<name>``) and the rest as JSON-able data."""
    arrays: Arrays = {}
    groups = []
    for g, group in enumerate(bank._groups):
        for name, array in _group_arrays(group).items():
            arrays[f"g{g}.{name}"] = np.array(array, copy=True)
        baselines: list[dict[str, object]] = []
        params, covs, betas = [], [], []
        for lane in group.lanes:
            for b in group.watch.histories[lane.index].versions:
                baselines.append({"lane": lane.index, "version": b.version, "source": b.source,
                                  "noise_sigma": b.noise_sigma, "t": b.t, "samples": b.samples, "note": b.note,
                                  "model": b.noise_model is not None})
                params.append(b.parameters)
                covs.append(b.covariance)
                betas.append(b.noise_model if b.noise_model is not None else np.full(_shape(group)[1], np.nan))
        n, m = _shape(group)
        arrays[f"g{g}.baselines.parameters"] = np.array(params).reshape(len(params), n)
        arrays[f"g{g}.baselines.covariance"] = np.array(covs).reshape(len(covs), n, n)
        arrays[f"g{g}.baselines.model"] = np.array(betas).reshape(len(betas), m)
        lanes = [{"channel": lane.channel, "applied": lane.counters.applied, "warmup": lane.counters.warmup,
                  "rejected": dict(lane.counters.rejected), "last_t": lane.last_t, "last_seq": lane.last_seq,
                  "last_tracked_t": lane.last_tracked_t,
                  "builders": [b.state() for b in lane.builders]} for lane in group.lanes]
        groups.append({"shape": _shape(group), "lanes": lanes, "baselines": baselines})
    return arrays, {"format": 1, "groups": groups}


def import_state(bank: ChannelBank, arrays: Arrays, meta: dict[str, Any]) -> list[str]:
    """Put a saved state into ``bank`` (freshly built); returns the channels that start afresh.

    Raises
    ------
    ValueError
        The saved state is not one this code wrote (unknown format, missing arrays).
    """
    if meta.get("format") != 1:
        raise ValueError(f"unknown bank state format {meta.get('format')!r}")
    saved: dict[str, tuple[int, int]] = {}
    for g, info in enumerate(meta["groups"]):
        for i, lane in enumerate(info["lanes"]):
            saved[lane["channel"]] = (g, i)
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
                    raise ValueError(f"saved state lacks {key}")
                source = arrays[key]
                if name in _CHANNEL_LAST:
                    target[..., dst] = source[..., src]
                else:
                    target[dst] = source[src]
            _restore_lanes(group, meta["groups"][g], arrays, g, dict(zip(theirs, mine, strict=True)))
        group.watch.detectors.repack()
    return fresh


def _restore_lanes(group: _Group, info: dict[str, Any], arrays: Arrays, g: int, to_lane: dict[int, int]) -> None:
    for saved_index, lane_index in to_lane.items():
        record = info["lanes"][saved_index]
        lane = group.lanes[lane_index]
        lane.counters.applied = int(record["applied"])
        lane.counters.warmup = int(record["warmup"])
        lane.counters.rejected = {str(k): int(v) for k, v in record["rejected"].items()}
        lane.last_t, lane.last_seq, lane.last_tracked_t = record["last_t"], record["last_seq"], record["last_tracked_t"]
        for builder, state in zip(lane.builders, record["builders"], strict=True):
            builder.restore(state)
        group.watch.histories[lane_index].versions.clear()
    params = arrays[f"g{g}.baselines.parameters"]
    covs = arrays[f"g{g}.baselines.covariance"]
    betas = arrays[f"g{g}.baselines.model"]
    for row, b in enumerate(info["baselines"]):
        lane_index = to_lane.get(int(b["lane"]))
        if lane_index is None:
            continue
        group.watch.histories[lane_index].add(Baseline(
            int(b["version"]), str(b["source"]), params[row], covs[row], float(b["noise_sigma"]),
            betas[row] if b["model"] else None, b["t"], int(b["samples"]), str(b["note"])))
