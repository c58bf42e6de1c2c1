"""Sample assembly against an independent reference: pandas ``merge_asof`` (a backward as-of join).

Hypothesis draws a plant (tags with and without ``max_age``; channels in ``latest`` and ``matched``
mode, inputs shared between channels, a tag that is one channel's output and another's input, twin
channels that are each other's input) and, per tag, the stamps it reports at: report by exception
(few, irregular updates, or none at all: a missing input), on a 0.5 s grid so that stamps of
different tags often tie, some of bad quality. Updates arrive in time order.

Ties: among updates with equal stamps, tags arrive in a drawn order (``rank``). An input update
stamped exactly ``t_out`` is then seen by the output's sample only if the input's tag arrives first,
which is ``merge_asof(..., allow_exact_matches=rank[input] < rank[output])``.

The reference, per channel and input: pandas ``merge_asof(left=output updates, right=input updates,
on="t", direction="backward")`` (pandas documentation, ``pandas.merge_asof``), once without a limit
(was there an input update at or before ``t_out`` at all?) and once with ``tolerance`` = the limit
in force (``max_age``, or in matched mode the smaller of the tolerance and ``max_age``). A sample is
formed when the output is good and every input was found, fresh and good; its reason otherwise is
the first failed check in the documented order. Everything is compared exactly.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from service.config.tag_settings import ChannelTagsConfig
from service.tags.assembler import FormingRefusal, SampleAssembler

PROPERTY_SETTINGS = settings(max_examples=150, deadline=None, derandomize=True, database=None)

EPOCH = 1767225600.0          # 2026-01-01T00:00:00Z; multiples of 0.5 s after it are exact in float64
GRID = 0.5                    # seconds between possible stamps: ties between tags are frequent


@st.composite
def plants(draw: st.DrawFn) -> dict[str, Any]:
    n_tags = draw(st.integers(2, 6))
    tag_ids = [f"T{k}" for k in range(n_tags)]
    max_age = {tag: draw(st.sampled_from([math.inf, math.inf, 0.5, 1.0, 2.5, 6.0])) for tag in tag_ids}
    channels: dict[str, ChannelTagsConfig] = {}
    for c in range(draw(st.integers(1, 5))):
        output = draw(st.integers(0, n_tags - 1))
        inputs = draw(st.lists(st.integers(0, n_tags - 1).filter(lambda k, o=output: k != o),
                               max_size=3, unique=True))
        mode = draw(st.sampled_from(["latest", "matched"]))
        tolerance = draw(st.sampled_from([0.0, 0.5, 1.0, 3.0, 100.0])) if mode == "matched" else None
        channels[f"ch{c}"] = ChannelTagsConfig(output=tag_ids[output],
                                               inputs={f"u{i}": tag_ids[k] for i, k in enumerate(inputs)},
                                               mode=mode, tolerance=tolerance)
    updates = []
    for k in range(n_tags):
        steps = draw(st.lists(st.integers(0, 40), max_size=14, unique=True))
        for step in sorted(steps):
            value = draw(st.floats(-1e6, 1e6, allow_nan=False, allow_subnormal=False))
            good = draw(st.integers(0, 7)) > 0                       # about one in eight of bad quality
            updates.append((EPOCH + GRID * step, k, value, good))
    rank = draw(st.permutations(range(n_tags)))
    updates.sort(key=lambda u: (u[0], rank[u[1]]))                    # time order; ties by rank
    return {"tag_ids": tag_ids, "max_age": max_age, "channels": channels, "updates": updates, "rank": rank}


def _frame(updates: list[tuple[float, int, float, bool]], k: int) -> pd.DataFrame:
    mine = [u for u in updates if u[1] == k]
    return pd.DataFrame({"t": [u[0] for u in mine], "value": [u[2] for u in mine], "good": [u[3] for u in mine]},
                        columns=["t", "value", "good"]).astype({"t": "float64", "value": "float64", "good": bool})


def _reference(plant: dict[str, Any], channel: ChannelTagsConfig) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """Samples and refusal counts of one channel, by merge_asof."""
    index = {tag: k for k, tag in enumerate(plant["tag_ids"])}
    rank, updates = plant["rank"], plant["updates"]
    out_k = index[channel.output]
    left = _frame(updates, out_k).rename(columns={"value": "y", "good": "out_good"})
    reason = pd.Series([None] * len(left), dtype=object)
    reason[~left["out_good"].to_numpy()] = FormingRefusal.OUTPUT_BAD_QUALITY.value
    columns = []
    for tag in channel.inputs.values():
        in_k = index[tag]
        right = _frame(updates, in_k).assign(t_in=lambda f: f["t"])
        exact = bool(rank[in_k] < rank[out_k])
        age = plant["max_age"][tag]
        limit = age if channel.mode == "latest" else min(age, channel.tolerance)
        too_old = (FormingRefusal.INPUT_UNMATCHED if channel.mode == "matched" and channel.tolerance <= age
                   else FormingRefusal.INPUT_STALE)
        anywhere = pd.merge_asof(left[["t"]], right, on="t", direction="backward", allow_exact_matches=exact)
        fresh = pd.merge_asof(left[["t"]], right, on="t", direction="backward", allow_exact_matches=exact,
                              tolerance=limit)
        open_rows = reason.isna()
        reason[open_rows & anywhere["t_in"].isna()] = FormingRefusal.INPUT_MISSING.value
        reason[reason.isna() & fresh["t_in"].isna()] = too_old.value
        reason[reason.isna() & fresh["good"].eq(False)] = FormingRefusal.INPUT_BAD_QUALITY.value
        columns.append(fresh["value"].to_numpy(dtype=np.float64))
    formed = reason.isna().to_numpy()
    inputs = np.column_stack(columns)[formed] if columns else np.zeros((int(formed.sum()), 0))
    samples = {"y": left["y"].to_numpy()[formed], "t": left["t"].to_numpy()[formed], "inputs": inputs}
    counts = {str(r): int(n) for r, n in reason.dropna().value_counts().items()}
    return samples, counts


@PROPERTY_SETTINGS
@given(plants())
def test_assembly_matches_merge_asof(plant: dict[str, Any]) -> None:
    assembler = SampleAssembler(plant["channels"], plant["max_age"], history=4)
    index = [assembler.index_of(tag) for tag in plant["tag_ids"]]
    used = [u for u in plant["updates"] if index[u[1]] is not None]
    batch = assembler.assemble([index[u[1]] for u in used], [u[0] for u in used], [u[2] for u in used],
                               np.array([u[3] for u in used], dtype=bool))
    for channel_id, channel in plant["channels"].items():
        expected, expected_counts = _reference(plant, channel)
        got = batch.samples.get(channel_id)
        if got is None:
            assert len(expected["y"]) == 0
        else:
            np.testing.assert_array_equal(got.y, expected["y"], strict=True)
            np.testing.assert_array_equal(got.t, expected["t"], strict=True)
            np.testing.assert_array_equal(got.inputs, expected["inputs"], strict=True)
            assert got.input_names == tuple(channel.inputs)
        assert {str(r): n for r, n in batch.refusals.get(channel_id, {}).items()} == expected_counts
    # Time order with strictly increasing stamps per tag: no update is ever late.
    assert batch.not_newer == {}
