"""Every stateful part exports its state and takes it back: ``state()`` then ``restore`` (or ``from_state``) is exact.

A part built from its configuration takes back the state of a part with the same configuration, and
refuses (``ValueError``, nothing changed) a state of other shapes or settings. The whole bank's state is
made of its parts' states, and a refusal anywhere leaves the whole bank as it was.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

from estimator import (
    BuilderState,
    ChannelBank,
    DetectorSettings,
    LogVarianceModel,
    NoiseVarianceTracker,
    RecursiveWLSBank,
    RegressorBuilder,
    RegressorSpec,
    export_state,
    import_state,
)
from estimator.detection.baseline import Baseline
from estimator.detection.detectors import DetectorBank
from tests.property.test_columns_match_exact_path import FAULTS, PLANT, _sample
from tests.support.state_equality import assert_same_state


def _stream(seed: int, rounds: int) -> list:
    rng = np.random.default_rng(seed)
    return [_sample(rng, cid, k, str(rng.choice(FAULTS)) if rng.random() < 0.05 else None)
            for k in range(1, rounds + 1) for cid in PLANT]


def _busy_bank() -> ChannelBank:
    """Every part with something learned: estimates, noise, models, baselines, conditions, lag buffers."""
    bank = ChannelBank(PLANT)
    bank.apply(_stream(3, 80))
    return bank


def test_a_fresh_bank_takes_back_a_busy_banks_whole_state() -> None:
    busy = _busy_bank()
    fresh = ChannelBank(PLANT)
    fresh.restore(busy.state())
    assert_same_state(fresh.state(), busy.state())
    more = _stream(4, 20)
    busy.apply(more)
    fresh.apply(more)
    assert_same_state(fresh.state(), busy.state())


def test_the_exported_state_holds_copies_never_views_of_live_state() -> None:
    bank = _busy_bank()
    state = bank.state()
    kept = ChannelBank(PLANT)
    kept.restore(state)                              # the same bits as `state`, held elsewhere
    bank.apply(_stream(5, 10))
    assert_same_state(state, kept.state())
    _, meta = export_state(bank)
    before = json.dumps(meta)
    bank.apply(_stream(6, 10))                       # refusals counted after the export
    assert json.dumps(export_state(bank)[1]) != before
    assert json.dumps(meta) == before


@pytest.mark.parametrize("part", ["bank", "tracker", "model"])
def test_the_estimators_rebuild_from_their_state_and_take_it_back_in_place(part: str) -> None:
    rng = np.random.default_rng(2)
    if part == "bank":
        original, twin = (RecursiveWLSBank(3, 2, [0.99, 1.0, 0.95], 10.0) for _ in range(2))
        for _ in range(30):
            original.update(rng.normal(size=(3, 2)), rng.normal(size=3))
    elif part == "tracker":
        original, twin = (NoiseVarianceTracker(3, [20.0, 30.0, 40.0], robust=True, warmup=2) for _ in range(2))
        for _ in range(30):
            original.update(None, rng.normal(size=3), rng.uniform(0.0, 1.0, 3), 1.0)
    else:
        original, twin = (LogVarianceModel(3, 2, 0.99, warmup=5) for _ in range(2))
        for _ in range(30):
            original.update(None, np.column_stack([np.ones(3), rng.normal(size=3)]), rng.normal(size=3),
                            rng.uniform(0.0, 1.0, 3), 1.0)
    assert_same_state(type(original).from_state(original.state()).state(), original.state())
    twin.restore(original.state())
    assert_same_state(twin.state(), original.state())


@pytest.mark.parametrize(("part", "match"), [
    ("bank_forgetting", "forgetting factors or covariance limits"),
    ("bank_shape", r"state.factor must have shape \(3, 3, 3\)"),
    ("tracker_half_life", "other settings"),
    ("model_warmup", "warmup 7"),
    ("detectors_shape", r"state.theta_ref must have shape \(2, 2\)"),
])
def test_a_state_of_other_settings_or_shapes_is_refused_and_nothing_changes(part: str, match: str) -> None:
    rng = np.random.default_rng(5)
    if part.startswith("bank"):
        target = RecursiveWLSBank(3, 2, 0.99)
        target.update(rng.normal(size=(3, 2)), rng.normal(size=3))
        other = RecursiveWLSBank(3, 2, 0.98) if part == "bank_forgetting" else RecursiveWLSBank(3, 3, 0.99)
    elif part.startswith("tracker"):
        target, other = NoiseVarianceTracker(3, 20.0), NoiseVarianceTracker(3, 21.0)
        target.update(None, rng.normal(size=3), np.zeros(3), 1.0)
    elif part.startswith("model"):
        target, other = LogVarianceModel(3, 2, warmup=5), LogVarianceModel(3, 2, warmup=7)
    else:
        target, other = DetectorBank([DetectorSettings()] * 2, 2), DetectorBank([DetectorSettings()] * 2, 3)
        target.set_baseline(0, Baseline(1, "engineer", np.ones(2), np.zeros((2, 2)), 0.5))
    before = target.state()
    with pytest.raises(ValueError, match=match):
        target.restore(other.state())
    assert_same_state(target.state(), before)


def test_a_builder_takes_back_only_a_state_of_the_same_lags() -> None:
    lagged = RegressorBuilder(RegressorSpec(["1", "u[-2]", "y[-1]"]))
    for k in range(4):
        lagged.push({"u": float(k)}, float(10 + k))
    twin = RegressorBuilder(RegressorSpec(["1", "u[-2]", "y[-1]"]))
    twin.restore(lagged.state())
    assert twin.state() == lagged.state() == BuilderState(4, (13.0,), {"u": (2.0, 3.0)}, True)
    plain = RegressorBuilder(RegressorSpec(["1", "u"]))
    with pytest.raises(ValueError, match=r"lagged inputs \['u'\] and history True"):
        plain.restore(lagged.state())
    assert plain.state() == BuilderState(0, (), {}, False)


def test_a_bank_refusing_part_of_a_state_is_left_as_it_was() -> None:
    bank = _busy_bank()
    before = bank.state()
    other = ChannelBank(PLANT)
    other.apply(_stream(9, 50))
    state = other.state()
    state = dataclasses.replace(state, groups=(*state.groups[:-1], dataclasses.replace(
        state.groups[-1], tracker=dataclasses.replace(state.groups[-1].tracker, warmup=99))))
    with pytest.raises(ValueError, match="other settings"):
        bank.restore(state)                          # every group before the last one was already restored
    assert_same_state(bank.state(), before)


def test_a_checkpoint_missing_an_array_leaves_the_bank_as_it_was() -> None:
    arrays, meta = export_state(_busy_bank())
    del arrays["g0.det.sigma_ref"]
    bank = _busy_bank()
    bank.apply(_stream(7, 5))
    before = bank.state()
    with pytest.raises(ValueError, match=r"saved state lacks g0\.det\.sigma_ref"):
        import_state(bank, arrays, json.loads(json.dumps(meta)))
    assert_same_state(bank.state(), before)
