"""Sample assembly depends only on the arrival order of updates: not on batches, not on a checkpoint between.

Hypothesis draws a plant and a stream in ANY arrival order (late inputs, outputs whose stamps go
backwards or repeat, bad-quality updates carrying NaN, short histories that drop updates), then
checks that these give the same samples, refusals and late counts bit for bit as one batch of the
whole stream: the stream cut into random batches; one update at a time; and the first part on one
assembler, its exported state imported into a new one (the checkpoint and restart of recovery),
the rest on that one. The final exported states must be equal too.
"""

from __future__ import annotations

import itertools
import math
from collections import Counter
from typing import Any

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from service.config.tag_settings import ChannelTagsConfig
from service.tags.assembler import AssembledBatch, SampleAssembler

PROPERTY_SETTINGS = settings(max_examples=120, deadline=None, derandomize=True, database=None)

EPOCH = 1767225600.0          # 2026-01-01T00:00:00Z


@st.composite
def streams(draw: st.DrawFn) -> dict[str, Any]:
    n_tags = draw(st.integers(2, 5))
    tag_ids = [f"T{k}" for k in range(n_tags)]
    max_age = {tag: draw(st.sampled_from([math.inf, 1.0, 3.0])) for tag in tag_ids}
    channels = {}
    for c in range(draw(st.integers(1, 4))):
        output = draw(st.integers(0, n_tags - 1))
        inputs = draw(st.lists(st.integers(0, n_tags - 1).filter(lambda k, o=output: k != o),
                               max_size=3, unique=True))
        mode = draw(st.sampled_from(["latest", "matched"]))
        channels[f"ch{c}"] = ChannelTagsConfig(
            output=tag_ids[output], inputs={f"u{i}": tag_ids[k] for i, k in enumerate(inputs)}, mode=mode,
            tolerance=draw(st.sampled_from([0.0, 1.0, 5.0])) if mode == "matched" else None)
    updates = []
    for _ in range(draw(st.integers(0, 60))):
        good = draw(st.integers(0, 5)) > 0
        value = draw(st.floats(-1e3, 1e3, allow_nan=False)) if good or draw(st.booleans()) else math.nan
        updates.append((draw(st.integers(0, n_tags - 1)), EPOCH + 0.5 * draw(st.integers(0, 30)), value, good))
    cuts = sorted(draw(st.lists(st.integers(0, len(updates)), max_size=5)))   # clipped to the used updates
    return {"tag_ids": tag_ids, "max_age": max_age, "channels": channels, "updates": updates, "cuts": cuts,
            "history": draw(st.sampled_from([1, 2, 4])), "checkpoint": draw(st.integers(0, len(updates)))}


def _assembler(stream: dict[str, Any]) -> SampleAssembler:
    return SampleAssembler(stream["channels"], stream["max_age"], history=stream["history"])


def _feed(assembler: SampleAssembler, updates: list[tuple[str, float, float, bool]]) -> AssembledBatch:
    indexed = [(assembler.index_of(tag), t, v, g) for tag, t, v, g in updates]
    return assembler.assemble(*SampleAssembler.columns_of(indexed))


def _merge(batches: list[AssembledBatch], sizes: list[int]) -> dict[str, Any]:
    """The batches as if they were one: samples concatenated (positions shifted), counts added up."""
    columns: dict[str, dict[str, list[np.ndarray]]] = {}
    refusals: Counter[tuple[str, str]] = Counter()
    late: Counter[str] = Counter()
    offset = 0
    for batch, size in zip(batches, sizes, strict=True):
        for channel, samples in batch.samples.items():
            parts = columns.setdefault(channel, {"y": [], "inputs": [], "t": [], "position": []})
            parts["y"].append(samples.y)
            parts["inputs"].append(samples.inputs)
            parts["t"].append(samples.t)
            parts["position"].append(samples.position + offset)
        for channel, counts in batch.refusals.items():
            refusals.update({(channel, str(reason)): n for reason, n in counts.items()})
        late.update(batch.not_newer)
        offset += size
    joined = {channel: {name: np.concatenate(parts[name]) for name in parts} for channel, parts in columns.items()}
    return {"samples": joined, "refusals": dict(refusals), "late": dict(late)}


def _same(a: dict[str, Any], b: dict[str, Any]) -> None:
    assert a["samples"].keys() == b["samples"].keys()
    for channel in a["samples"]:
        for name in ("y", "inputs", "t", "position"):
            np.testing.assert_array_equal(a["samples"][channel][name], b["samples"][channel][name], strict=True)
    assert a["refusals"] == b["refusals"]
    assert a["late"] == b["late"]


def _same_state(a: SampleAssembler, b: SampleAssembler) -> None:
    (arrays_a, meta_a), (arrays_b, meta_b) = a.export_state(), b.export_state()
    assert meta_a == meta_b
    for name in arrays_a:
        np.testing.assert_array_equal(arrays_a[name], arrays_b[name], strict=True)


@PROPERTY_SETTINGS
@given(streams())
def test_batches_single_updates_and_a_checkpoint_change_nothing(stream: dict[str, Any]) -> None:
    whole_assembler = _assembler(stream)
    # Only tags some channel names reach the assembler (the caller asks index_of first).
    updates = [(f"T{k}", t, v, g) for k, t, v, g in stream["updates"] if whole_assembler.index_of(f"T{k}") is not None]
    whole = _merge([_feed(whole_assembler, updates)], [len(updates)])

    cut_assembler = _assembler(stream)
    bounds = [0, *(min(cut, len(updates)) for cut in stream["cuts"]), len(updates)]
    pieces = [updates[a:b] for a, b in itertools.pairwise(bounds)]
    _same(whole, _merge([_feed(cut_assembler, piece) for piece in pieces], [len(p) for p in pieces]))
    _same_state(whole_assembler, cut_assembler)

    one_assembler = _assembler(stream)
    singles = []
    for i, (tag, t, v, g) in enumerate(updates):
        index = one_assembler.index_of(tag)
        assert index is not None
        singles.append(one_assembler.update(tag if i % 2 else index, t, v, g))     # by id and by index
    _same(whole, _merge(singles, [1] * len(updates)))

    split = min(stream["checkpoint"], len(updates))
    before = _assembler(stream)
    first = _feed(before, updates[:split])
    arrays, meta = before.export_state()
    after = _assembler(stream)
    assert after.import_state(arrays, meta) == []
    _same_state(before, after)
    second = _feed(after, updates[split:])
    _same(whole, _merge([first, second], [split, len(updates) - split]))
    _same_state(whole_assembler, after)
