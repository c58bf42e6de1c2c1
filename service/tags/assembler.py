"""Channel samples assembled from tag updates: a sample forms when a channel's OUTPUT tag updates.

A plant publishes each signal on its own, at its own moments; a channel relates one output tag ``y``
to input tags. :class:`SampleAssembler` keeps, per tag, its newest few updates (value, time stamp,
quality) and, whenever a channel's output tag updates at ``t_out``, takes for each input the newest
update stamped at or before ``t_out``:

``latest`` mode
    used when ``t_out - t_in <= max_age`` of the input tag (seconds; unbounded by default, for
    report-by-exception tags that publish only on change);
``matched`` mode (plants that scan synchronously)
    used when also ``t_out - tolerance <= t_in`` (the channel's tolerance, seconds). The stricter of
    the two limits decides; an input too old for it is ``input_unmatched`` when the tolerance is the
    stricter (or they are equal), ``input_stale`` otherwise.

The same rule as a backward as-of join (pandas ``merge_asof(direction="backward")`` with the limit as
``tolerance``), which is what ``tests/property/test_tag_assembly_oracle.py`` checks it against.

**Arrival order decides; nothing is revised.** Updates are taken in the order they arrive, and a
sample, once formed or refused, stays so. An update whose stamp is later than the tag's newest kept
stamp is kept (the oldest of the ``history`` kept is dropped); any other (a late arrival, a
repeat) is not kept and is counted in :attr:`AssembledBatch.not_newer`. So an input value that
arrives after the output update it belonged to does not change that sample: it becomes the input's
newest value for later samples when its stamp is newer than the one held, and is ignored otherwise.
An output update forms its channels' samples whether or not its stamp advances (a repeated or
backward output stamp is passed through: the estimator refuses it by its own rule). Kept stamps of
a tag are strictly increasing, so the search for ``t_in <= t_out`` walks back from the newest and
usually stops at once; the history lets an output whose stamps lag its inputs' (a slower gateway)
still find the input value of its moment.

Refusals (:class:`FormingRefusal`, counted per channel; the tag messages themselves were fine, so they
are no dead letters). The first failed check gives the reason: the output's quality, then each input
in the channel's order: missing, ahead, stale or unmatched, bad quality.

Determinism: the outcome depends only on the configuration and the sequence of updates in arrival
order, never on how that sequence is cut into batches, so an input log replayed, or a historian CSV
read in file order, gives the same samples bit for bit; :meth:`SampleAssembler.export_state` and
:meth:`SampleAssembler.import_state` carry the kept updates across a checkpoint.

Cost: per update O(1) to keep it, plus O(inputs) for each channel whose output it is, on Python lists
of floats; no object per update (per batch, a few lists per channel that forms samples, and one array
per field). About 2-3 microseconds per update for 1,000 channels of one input each on the 2-core
VM of the benchmarks (``tests/benchmarks/test_tag_assembly_cost.py``).
:meth:`SampleAssembler.assemble` takes columns (whole arrays) and gives columns per channel;
:meth:`SampleAssembler.update` takes one update through the same loop (scalar checks instead of
array ones).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.config.tag_settings import ChannelTagsConfig

__all__ = ["AssembledBatch", "ChannelSamples", "FormingRefusal", "SampleAssembler"]

FloatArray = NDArray[np.float64]


class FormingRefusal(StrEnum):
    """Why an output update formed no sample of a channel (stable codes, in the order they are checked)."""

    OUTPUT_BAD_QUALITY = "output_bad_quality"   # the output update's quality is not good
    INPUT_MISSING = "input_missing"             # the input tag has no update stamped at or before t_out
    INPUT_AHEAD = "input_ahead"                 # every kept update is stamped after t_out; older ones were dropped
    INPUT_STALE = "input_stale"                 # t_out - t_in > the input tag's max_age
    INPUT_UNMATCHED = "input_unmatched"         # matched mode: t_out - t_in > the channel's tolerance
    INPUT_BAD_QUALITY = "input_bad_quality"     # the input update used is not of good quality


_REFUSALS = tuple(FormingRefusal)
_OUTPUT_BAD, _MISSING, _AHEAD, _STALE, _UNMATCHED, _INPUT_BAD = range(len(_REFUSALS))


@dataclass(frozen=True)
class ChannelSamples:
    """The samples one batch formed for one channel, in arrival order of their output updates.

    ``y``, ``t``: ``(m,)``; ``inputs``: ``(m, p)`` with columns in ``input_names`` order;
    ``position``: ``(m,)`` index, within the batch, of the output update that formed each sample.
    Times are epoch seconds. The arrays are views of arrays made for the batch, never of the
    assembler's state.
    """

    input_names: tuple[str, ...]
    y: FloatArray
    inputs: FloatArray
    t: FloatArray
    position: NDArray[np.int64]

    def __len__(self) -> int:
        return len(self.y)


@dataclass(frozen=True)
class AssembledBatch:
    """What one batch of tag updates gave.

    ``samples``: channels that formed at least one sample, in configuration order.
    ``refusals``: per channel with at least one refusal, the count by reason (reasons in check order).
    ``not_newer``: per tag, the updates whose stamp was not later than the tag's newest kept one (not kept).
    """

    samples: dict[str, ChannelSamples]
    refusals: dict[str, dict[FormingRefusal, int]]
    not_newer: dict[str, int]


class SampleAssembler:
    """Forms channel samples from tag updates taken in arrival order.

    Parameters
    ----------
    channels : mapping of str to ChannelTagsConfig
        Each channel's output tag and input tags (input name -> tag id), mode and tolerance.
    max_age : mapping of str to float
        Seconds an update of each tag stays valid (``inf``: unbounded); every tag a channel names
        needs one (:meth:`~service.tags.registry.TagRegistry.max_ages` gives them).
    history : int
        Updates kept per tag: an output may lag its inputs by up to ``history - 1`` of their updates.

    Raises
    ------
    ValueError
        A tag without ``max_age``, a ``max_age`` not > 0, or ``history`` < 1.
    """

    def __init__(self, channels: Mapping[str, ChannelTagsConfig], max_age: Mapping[str, float],
                 history: int = 16) -> None:
        if history < 1:
            raise ValueError(f"history must be >= 1, got {history}")
        index: dict[str, int] = {}
        for config in channels.values():
            for tag_id in (config.output, *config.inputs.values()):
                index.setdefault(tag_id, len(index))
        lacking = [tag_id for tag_id in index if tag_id not in max_age]
        if lacking:
            raise ValueError(f"max_age lacks tag(s) {lacking[:5]}")
        bad = {tag_id: max_age[tag_id] for tag_id in index if not max_age[tag_id] > 0.0}
        if bad:
            raise ValueError(f"max_age must be > 0 seconds (inf: unbounded), got {bad}")

        self.history = history
        self.channel_ids: tuple[str, ...] = tuple(channels)
        self.tag_ids: tuple[str, ...] = tuple(index)
        self._index = index
        self._input_names = tuple(tuple(config.inputs) for config in channels.values())
        outputs_of: list[list[int]] = [[] for _ in index]
        self._inputs_of: list[tuple[tuple[int, float, int], ...]] = []
        for c, config in enumerate(channels.values()):
            outputs_of[index[config.output]].append(c)
            plan = []
            for tag_id in config.inputs.values():
                age = float(max_age[tag_id])
                if config.mode == "matched" and config.tolerance is not None and config.tolerance <= age:
                    plan.append((index[tag_id], float(config.tolerance), _UNMATCHED))
                else:
                    plan.append((index[tag_id], age, _STALE))
            self._inputs_of.append(tuple(plan))
        self._outputs_of = tuple(tuple(cs) for cs in outputs_of)
        self._reset()

    def _reset(self) -> None:
        n, h = len(self.tag_ids), self.history
        # Per tag a ring of `history` slots (tag k owns [k*h, (k+1)*h)); `head` is the slot of the newest.
        self._t: list[float] = [float("nan")] * (n * h)
        self._v: list[float] = [float("nan")] * (n * h)
        self._g: list[bool] = [False] * (n * h)
        self._head = [h - 1] * n
        self._held = [0] * n
        self._dropped = [False] * n
        self._newest = [float("-inf")] * n

    def index_of(self, tag_id: str) -> int | None:
        """The tag's index for :meth:`assemble`, or None when no channel names the tag."""
        return self._index.get(tag_id)

    # ------------------------------------------------------------------------------------------ updates
    def assemble(self, tags: ArrayLike, t: ArrayLike, value: ArrayLike, good: ArrayLike) -> AssembledBatch:
        """Take a batch of tag updates, in arrival order, and form the samples they complete.

        Parameters
        ----------
        tags : array of int, shape (n,)
            Tag indexes (:meth:`index_of`, positions in :attr:`tag_ids`).
        t : array of float, shape (n,)
            Time stamps, epoch seconds; finite.
        value : array of float, shape (n,)
            Values; finite where ``good`` (a bad-quality value may be NaN).
        good : array of bool, shape (n,)
            Quality: True when good.

        Raises
        ------
        ValueError
            Shapes differ, an index is out of range, a stamp is not finite, or a good value is not
            finite; nothing is changed.
        """
        tag_array = np.asarray(tags)
        t_array = np.asarray(t, dtype=np.float64)
        value_array = np.asarray(value, dtype=np.float64)
        good_array = np.asarray(good)
        n = tag_array.shape[0] if tag_array.ndim == 1 else -1
        if any(a.ndim != 1 or a.shape[0] != n for a in (tag_array, t_array, value_array, good_array)):
            raise ValueError(f"tags, t, value and good must be 1-D of one length, got shapes {tag_array.shape}, "
                             f"{t_array.shape}, {value_array.shape}, {good_array.shape}")
        if n == 0:
            return AssembledBatch({}, {}, {})
        if not np.issubdtype(tag_array.dtype, np.integer):
            raise ValueError(f"tags must be integer indexes, got dtype {tag_array.dtype}")
        if good_array.dtype != np.bool_:
            raise ValueError(f"good must be booleans, got dtype {good_array.dtype}")
        if tag_array.min() < 0 or tag_array.max() >= len(self.tag_ids):
            raise ValueError(f"tags must be in [0, {len(self.tag_ids)}), got {tag_array.min()}..{tag_array.max()}")
        if not np.isfinite(t_array).all():
            raise ValueError("t must be finite epoch seconds")
        if not (np.isfinite(value_array) | ~good_array).all():
            raise ValueError("a value of good quality must be finite")
        return self._run(tag_array.tolist(), t_array.tolist(), value_array.tolist(), good_array.tolist())

    def update(self, tag: int | str, t: float, value: float, good: bool = True) -> AssembledBatch:
        """One tag update (by index or id): the same checks and the same loop as :meth:`assemble`.

        Raises
        ------
        ValueError
            An unknown tag, or what :meth:`assemble` refuses; nothing is changed.
        """
        if isinstance(tag, str):
            found = self._index.get(tag)
            if found is None:
                raise ValueError(f"no channel names tag {tag[:40]!r}")
            tag = found
        elif not 0 <= tag < len(self.tag_ids):
            raise ValueError(f"tags must be in [0, {len(self.tag_ids)}), got {tag}")
        t, value = float(t), float(value)
        if not math.isfinite(t):
            raise ValueError("t must be finite epoch seconds")
        if good and not math.isfinite(value):
            raise ValueError("a value of good quality must be finite")
        return self._run([int(tag)], [t], [value], [bool(good)])

    def _run(self, tags: list[int], times: list[float], values: list[float], goods: list[bool]) -> AssembledBatch:
        h = self.history
        T, V, G = self._t, self._v, self._g
        head, held, dropped, newest = self._head, self._held, self._dropped, self._newest
        outputs_of, inputs_of = self._outputs_of, self._inputs_of
        formed: dict[int, tuple[list[float], list[float], list[float], list[int]]] = {}
        refused: dict[int, list[int]] = {}
        not_newer: dict[int, int] = {}

        for position, (k, tk, vk, gk) in enumerate(zip(tags, times, values, goods, strict=True)):
            if tk > newest[k]:
                slot = head[k] + 1
                if slot == h:
                    slot = 0
                head[k] = slot
                cell = k * h + slot
                T[cell], V[cell], G[cell] = tk, vk, gk
                newest[k] = tk
                if held[k] < h:
                    held[k] += 1
                else:
                    dropped[k] = True
            else:
                not_newer[k] = not_newer.get(k, 0) + 1
            for c in outputs_of[k]:
                reason = -1
                if not gk:
                    reason = _OUTPUT_BAD
                else:
                    out = formed.get(c)
                    if out is None:
                        out = formed[c] = ([], [], [], [])
                    row = out[1]
                    start = len(row)
                    for j, limit, too_old in inputs_of[c]:
                        cell = j * h + head[j]
                        # Unused cells hold NaN, so one test covers "nothing kept" and "newest is after t_out".
                        if not T[cell] <= tk:
                            cell = self._at_or_before(j, tk)
                            if cell < 0:
                                reason = _AHEAD if cell == -2 else _MISSING
                                break
                        if tk - T[cell] > limit:
                            reason = too_old
                            break
                        if not G[cell]:
                            reason = _INPUT_BAD
                            break
                        row.append(V[cell])
                    if reason < 0:
                        out[0].append(vk)
                        out[2].append(tk)
                        out[3].append(position)
                        continue
                    del row[start:]
                counts = refused.get(c)
                if counts is None:
                    counts = refused[c] = [0] * len(_REFUSALS)
                counts[reason] += 1
        return self._batch(formed, refused, not_newer)

    def _at_or_before(self, j: int, t_out: float) -> int:
        """Cell of tag ``j``'s newest kept update stamped at or before ``t_out``; -1 none ever, -2 dropped."""
        h = self.history
        base, slot = j * h, self._head[j]
        for _ in range(self._held[j]):
            if self._t[base + slot] <= t_out:
                return base + slot
            slot = slot - 1 if slot else h - 1
        return -2 if self._dropped[j] else -1

    def _batch(self, formed: dict[int, tuple[list[float], list[float], list[float], list[int]]],
               refused: dict[int, list[int]], not_newer: dict[int, int]) -> AssembledBatch:
        # One array per field for the whole batch, then each channel's views of it: a few numpy calls per
        # batch instead of four per channel (a batch often gives many channels one sample each).
        order = [c for c in sorted(formed) if formed[c][0]]
        ys: list[float] = []
        xs: list[float] = []
        ts: list[float] = []
        positions: list[int] = []
        for c in order:
            out = formed[c]
            ys += out[0]
            xs += out[1]
            ts += out[2]
            positions += out[3]
        y_all, x_all = np.array(ys, dtype=np.float64), np.array(xs, dtype=np.float64)
        t_all, position_all = np.array(ts, dtype=np.float64), np.array(positions, dtype=np.int64)
        samples = {}
        row = cell = 0
        for c in order:
            m, names = len(formed[c][0]), self._input_names[c]
            width = m * len(names)
            samples[self.channel_ids[c]] = ChannelSamples(
                names, y_all[row:row + m], x_all[cell:cell + width].reshape(m, len(names)), t_all[row:row + m],
                position_all[row:row + m])
            row += m
            cell += width
        refusals = {self.channel_ids[c]: {_REFUSALS[r]: n for r, n in enumerate(refused[c]) if n}
                    for c in sorted(refused)}
        return AssembledBatch(samples, refusals, {self.tag_ids[k]: n for k, n in sorted(not_newer.items())})

    # -------------------------------------------------------------------------------------------- state
    def export_state(self) -> tuple[dict[str, NDArray[Any]], dict[str, object]]:
        """The kept updates of every tag, as arrays and a JSON-able description.

        Arrays: ``t``, ``value`` ``(n_tags, history)`` float64 and ``good`` bool, each tag's kept
        updates oldest first and aligned right (unused cells NaN / False); ``held`` ``(n_tags,)``
        int64; ``dropped`` ``(n_tags,)`` bool (older updates were let go). Description:
        ``{"tag_ids": [...], "history": int}``. Copies: later updates do not change them.
        """
        n, h = len(self.tag_ids), self.history
        times = np.full((n, h), np.nan)
        values = np.full((n, h), np.nan)
        good = np.zeros((n, h), dtype=bool)
        for k in range(n):
            slot = self._head[k]
            for column in range(h - 1, h - 1 - self._held[k], -1):
                cell = k * h + slot
                times[k, column], values[k, column], good[k, column] = self._t[cell], self._v[cell], self._g[cell]
                slot = slot - 1 if slot else h - 1
        arrays: dict[str, NDArray[Any]] = {
            "t": times, "value": values, "good": good,
            "held": np.array(self._held, dtype=np.int64), "dropped": np.array(self._dropped, dtype=bool)}
        return arrays, {"tag_ids": list(self.tag_ids), "history": h}

    def import_state(self, arrays: Mapping[str, NDArray[Any]], meta: Mapping[str, Any]) -> list[str]:
        """Take back exported state; every tag starts from it or, when absent from it, empty.

        Tags are matched by id, so a configuration that gained or lost tags takes what it still has.
        A smaller ``history`` keeps each tag's newest updates (the tag then counts as having dropped
        older ones).

        Returns
        -------
        list of str
            Tag ids in the state that this assembler does not know (ignored).

        Raises
        ------
        ValueError
            Arrays whose shapes do not fit the description; nothing is changed.
        """
        tag_ids = [str(tag_id) for tag_id in meta["tag_ids"]]
        saved_history = int(meta["history"])
        n = len(tag_ids)
        for name in ("t", "value", "good"):
            if arrays[name].shape != (n, saved_history):
                raise ValueError(f"state array {name!r} has shape {arrays[name].shape}, expected {(n, saved_history)}")
        for name in ("held", "dropped"):
            if arrays[name].shape != (n,):
                raise ValueError(f"state array {name!r} has shape {arrays[name].shape}, expected {(n,)}")
        saved_held = arrays["held"].astype(np.int64)
        if n and (saved_held.min() < 0 or saved_held.max() > saved_history):
            raise ValueError(f"state array 'held' must be in [0, {saved_history}]")
        self._reset()
        h = self.history
        unknown = []
        for row, tag_id in enumerate(tag_ids):
            k = self._index.get(tag_id)
            if k is None:
                unknown.append(tag_id)
                continue
            count = int(saved_held[row])
            keep = min(count, h)
            columns = range(saved_history - keep, saved_history)
            for slot, column in enumerate(columns):
                cell = k * h + slot
                self._t[cell] = float(arrays["t"][row, column])
                self._v[cell] = float(arrays["value"][row, column])
                self._g[cell] = bool(arrays["good"][row, column])
            self._held[k] = keep
            self._head[k] = keep - 1 if keep else h - 1
            self._dropped[k] = bool(arrays["dropped"][row]) or count > h
            self._newest[k] = self._t[k * h + keep - 1] if keep else float("-inf")
        return unknown

    # ------------------------------------------------------------------------------------------- helpers
    @staticmethod
    def columns_of(updates: Sequence[tuple[int, float, float, bool]]) -> tuple[NDArray[np.int64], FloatArray,
                                                                                FloatArray, NDArray[np.bool_]]:
        """``(tags, t, value, good)`` columns of a list of ``(tag index, t, value, good)`` updates."""
        if not updates:
            return (np.zeros(0, dtype=np.int64), np.zeros(0), np.zeros(0), np.zeros(0, dtype=bool))
        tags, times, values, good = zip(*updates, strict=True)
        return (np.array(tags, dtype=np.int64), np.array(times, dtype=np.float64),
                np.array(values, dtype=np.float64), np.array(good, dtype=bool))
