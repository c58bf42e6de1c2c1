"""ChannelBank.apply_columns gives the state and outcomes of ChannelBank.apply, bit for bit (hypothesis).

Hypothesis draws a plant (channels with lag-free and ARX terms, every
weighting, rules, forgetting, time-based half-lives, operating-point models),
a stream with refusals mixed in (NaN, missing inputs, repeated or backward
seq and t, bad sigma and weight, mixed presence of fields), and a split into
micro-batches. One bank takes each micro-batch sample by sample, the other
as columns; their whole exported states (``ChannelBank.state()``: every array,
counter and lag buffer, whatever fields the states come to have) must be the
same bits afterwards.
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from estimator.channels.channel import ChannelSettings, PathTuning, Sample, WeightRule
from estimator.channels.channel_bank import ChannelBank, ChannelBankState, ChannelEvent
from estimator.channels.group_watch import WatchState
from estimator.channels.sample_columns import SampleColumns
from estimator.detection.detectors import ConditionTiming, DetectorSettings
from tests.support.state_equality import assert_same_state

PROPERTY_SETTINGS = settings(max_examples=60, deadline=None, derandomize=True, database=None)

# Touchy detectors that learn their baseline and noise shape early, so conditions come and go within a short stream.
WATCH = DetectorSettings(commissioning_samples=12, calibration_samples=6, noise_ratio=1.3, variance_h=2.0,
                         offset_k=0.2, offset_h=1.5, drift_alpha=0.2, drift_every=3,
                         timing=(("offset", ConditionTiming(0.3, 15.0, 25.0)), ("drift", ConditionTiming(0.5))))
PLANT = {
    "lin": ChannelSettings(terms=("1", "u"), forgetting_factor=0.99, covariance_limit=5.0, detectors=WATCH),
    "lin_tracked": ChannelSettings(terms=("1", "u"), forgetting_factor=0.999, weighting="tracked",
                                   initial_sigma=0.5, noise_warmup=3, detectors=WATCH),
    "lin_rules": ChannelSettings(terms=("u", "1"), weighting="tracked", noise_warmup=2,
                                 weight_rules=(WeightRule("u", -0.5, 0.5, 3.0), WeightRule("u", 0.0, 2.0, 0.5))),
    "lin_sample": ChannelSettings(terms=("1", "u"), weighting="sample",
                                  weight_rules=(WeightRule("u", -1.0, 0.0, 2.0),), detectors=WATCH),
    "quad": ChannelSettings(terms=("1", "u", "u^2"), forgetting_factor=0.995),
    "arx": ChannelSettings(terms=("1", "y[-1]", "u[-2]"), forgetting_factor=0.999, weighting="tracked",
                           noise_model_terms=("1", "u"), noise_warmup=2, detectors=WATCH),
    "arx_plain": ChannelSettings(terms=("y[-2]", "u", "1")),
    "timed": ChannelSettings(terms=("1", "u"), weighting="tracked", noise_half_life=30.0,
                             noise_half_life_in_seconds=True, noise_robust=True, noise_warmup=2, detectors=WATCH),
}

FAULTS = ("nan_y", "missing_input", "repeat_seq", "backward_seq", "repeat_t", "backward_t", "no_t",
          "bad_sigma", "no_sigma", "zero_weight", "inf_input", "nan_t", "huge_u", "unknown")


def _sample(rng: np.random.Generator, cid: str, k: int, fault: str | None) -> Sample:
    u = float(rng.normal())
    y = 1.0 + 0.5 * u + float(rng.normal(0.0, 0.2))
    t: float | None = 1000.0 + 10.0 * k + float(rng.uniform(0.0, 5.0))
    seq: int | None = k
    sigma = 0.2 if cid == "lin_sample" else None
    weight = None
    inputs = {"u": u}
    if fault == "nan_y":
        y = math.nan
    elif fault == "missing_input":
        inputs = {}
    elif fault == "repeat_seq":
        seq = k - 1
    elif fault == "backward_seq":
        seq = max(k - 5, 0)
    elif fault == "repeat_t":
        t = 1000.0 + 10.0 * (k - 1)
    elif fault == "backward_t":
        t = 0.0
    elif fault == "no_t":
        t = None
    elif fault == "nan_t":
        t = math.nan
    elif fault == "bad_sigma":
        sigma = -1.0
    elif fault == "no_sigma":
        sigma = None
    elif fault == "zero_weight":
        weight = 0.0
    elif fault == "inf_input":
        inputs = {"u": math.inf}
    elif fault == "huge_u":
        inputs = {"u": 1e200}               # u^2 overflows: the bank refuses the row
    elif fault == "unknown":
        cid = "nobody"
    return Sample(cid, y, inputs, t, sigma, weight, seq)


@st.composite
def streams(draw) -> tuple[list[Sample], list[int], PathTuning]:
    seed = draw(st.integers(0, 2**32 - 1))
    rounds = draw(st.integers(1, 60))
    channels = draw(st.lists(st.sampled_from(sorted(PLANT)), min_size=1, max_size=len(PLANT), unique=True))
    fault_rate = draw(st.sampled_from([0.0, 0.02, 0.2]))
    with_seq = draw(st.booleans())
    rng = np.random.default_rng(seed)
    samples = []
    for k in range(1, rounds + 1):
        for cid in channels:
            fault = str(rng.choice(FAULTS)) if rng.random() < fault_rate else None
            s = _sample(rng, cid, k, fault)
            samples.append(s if with_seq else Sample(s.channel, s.y, s.inputs, s.t, s.sigma, s.weight, None))
    cuts = sorted(set(draw(st.lists(st.integers(0, len(samples)), max_size=8))))
    return samples, cuts, PathTuning(draw(st.integers(1, 9)), draw(st.integers(1, 300)))


def _columns(batch: list[Sample]) -> dict[str, SampleColumns]:
    by_channel: dict[str, list[Sample]] = {}
    for s in batch:
        by_channel.setdefault(s.channel, []).append(s)
    return {cid: SampleColumns.from_samples(ss) for cid, ss in by_channel.items()}


@PROPERTY_SETTINGS
@given(streams())
def test_columns_give_the_bits_and_outcomes_of_the_exact_path(
        stream: tuple[list[Sample], list[int], PathTuning]) -> None:
    # The tuning only moves work between the scalar, vectorised and column paths: the bits never change.
    samples, cuts, tuning = stream
    exact, columnar = ChannelBank(PLANT, PathTuning(1, 1)), ChannelBank(PLANT, tuning)
    bounds = [0, *cuts, len(samples)]
    for lo, hi in itertools.pairwise(bounds):
        batch = samples[lo:hi]
        expected = exact.apply(batch)
        keep = len(batch) % 2 == 1                   # the fitted rows asked for in every other batch, or so
        got = columnar.apply_columns(_columns(batch), keep_rows=keep)
        for cid in {s.channel for s in batch}:
            mine = [o for s, o in zip(batch, expected, strict=True) if s.channel == cid]
            result = got[cid]
            if keep:
                # The rows rwls fit takes: each applied sample's regressor, output and the weight its update used.
                ys = [s.y for s in batch if s.channel == cid]
                rows = result.rows
                assert rows is not None
                applied_at = [k for k, o in enumerate(mine) if o.status == "applied"]
                assert rows.position.tolist() == applied_at
                assert rows.Z.tolist() == [mine[k].regressor for k in applied_at]
                assert rows.w.tolist() == [mine[k].weight for k in applied_at]
                assert rows.y.tolist() == [ys[k] for k in applied_at]
            else:
                assert result.rows is None
            assert result.applied == sum(o.status == "applied" for o in mine)
            assert result.warmup == sum(o.status == "warmup" for o in mine)
            assert result.refused == [(k, o.reason) for k, o in enumerate(mine) if o.status == "refused"]
            applied = [k for k, o in enumerate(mine) if o.status == "applied"]
            assert result.last_applied == (applied[-1] if applied else None)
        assert _by_channel(exact.take_events()) == _by_channel(columnar.take_events())
    assert_same_state(columnar.state(), exact.state())


def _by_channel(events: list[ChannelEvent]) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for event in events:
        out.setdefault(event.channel, []).append(repr(event))       # repr: NaN compares equal as text
    return out


def test_clean_columns_take_the_vectorised_rounds() -> None:
    # Without refusals nothing falls back: the exact path is never called.
    bank = ChannelBank(PLANT, PathTuning(vector_min=1, column_min_samples=1))
    rng = np.random.default_rng(7)
    batch = [_sample(rng, cid, k, None) for k in range(1, 40) for cid in PLANT]
    called = []
    original = bank.apply
    bank.apply = lambda samples: called.append(len(samples)) or original(samples)   # type: ignore[method-assign]
    outcomes = bank.apply_columns(_columns(batch))
    assert called == []
    assert sum(o.applied + o.warmup for o in outcomes.values()) == len(batch)
    reference = ChannelBank(PLANT)
    reference.apply(batch)
    assert_same_state(bank.state(), reference.state())


def test_the_rounds_keep_the_rows_and_weights_the_exact_path_applied() -> None:
    # Every channel in the vectorised rounds (tracked weights made per round included): rwls fit's rows.
    bank = ChannelBank(PLANT, PathTuning(vector_min=1, column_min_samples=1))
    reference = ChannelBank(PLANT)
    rng = np.random.default_rng(11)
    batch = [_sample(rng, cid, k, None) for k in range(1, 40) for cid in PLANT]
    outcomes = bank.apply_columns(_columns(batch), keep_rows=True)
    expected = reference.apply(batch)
    for cid in PLANT:
        mine = [(s, o) for s, o in zip(batch, expected, strict=True) if s.channel == cid and o.status == "applied"]
        rows = outcomes[cid].rows
        assert rows is not None and rows.position.shape[0] == len(mine) > 0
        assert rows.Z.tolist() == [o.regressor for _, o in mine]
        assert rows.w.tolist() == [o.weight for _, o in mine]
        assert rows.y.tolist() == [s.y for s, _ in mine]


def _both_paths() -> tuple[ChannelBank, ChannelBank]:
    """A stream with refusals through the exact path and through the columns: banks with the same state."""
    rng = np.random.default_rng(8)
    batch = [_sample(rng, cid, k, str(rng.choice(FAULTS)) if rng.random() < 0.05 else None)
             for k in range(1, 60) for cid in PLANT]
    exact, columnar = ChannelBank(PLANT, PathTuning(1, 1)), ChannelBank(PLANT, PathTuning(1, 1))
    exact.apply(batch)
    columnar.apply_columns(_columns(batch))
    return exact, columnar


@functools.cache
def _grown_watch_state(names: tuple[str, ...]) -> type:
    return dataclasses.make_dataclass("WatchState", [(name, object) for name in names], bases=(WatchState,),
                                      frozen=True)


def _grown(state: ChannelBankState, **extra: object) -> ChannelBankState:
    """``state`` as if the watch's state class had gained the fields ``extra`` (a later version of it)."""
    if not extra:
        return state
    watch = state.groups[0].watch
    grown = _grown_watch_state(tuple(extra))
    group = dataclasses.replace(state.groups[0], watch=grown(
        **{f.name: getattr(watch, f.name) for f in dataclasses.fields(watch)}, **extra))
    return dataclasses.replace(state, groups=(group, *state.groups[1:]))


@pytest.mark.parametrize(("exact_extra", "columnar_extra", "reported"), [
    ({}, {"sweeps": 3}, r"groups\[0\]\.watch\.sweeps: only in actual"),
    ({"sweeps": 3}, {}, r"groups\[0\]\.watch\.sweeps: only in expected"),
    ({"sweeps": 3}, {"sweeps": 4}, r"groups\[0\]\.watch\.sweeps: 4, expected 3"),
], ids=["only_columns_export_it", "only_the_exact_path_exports_it", "both_export_it_unequal"])
def test_a_field_the_paths_export_differently_fails_the_comparison_naming_it(
        monkeypatch: pytest.MonkeyPatch, exact_extra: dict[str, object], columnar_extra: dict[str, object],
        reported: str) -> None:
    # The comparison walks the states' own fields: a field added to a state class, and listed nowhere
    # in this test, is compared all the same.
    exact, columnar = _both_paths()
    assert_same_state(columnar.state(), exact.state())
    for bank, extra in ((exact, exact_extra), (columnar, columnar_extra)):
        monkeypatch.setattr(bank, "state", lambda own=bank.state, extra=extra: _grown(own(), **extra))
    with pytest.raises(AssertionError, match=reported):
        assert_same_state(columnar.state(), exact.state())


def test_one_changed_bit_deep_in_one_path_fails_the_comparison_naming_where() -> None:
    exact, columnar = _both_paths()
    state = columnar.state()
    running = state.groups[0].watch.detectors.running.copy()
    running[0, 0] = np.nextafter(running[0, 0], np.inf)               # the next float up: one bit
    changed = dataclasses.replace(state.groups[0].watch.detectors, running=running)
    group = dataclasses.replace(state.groups[0], watch=dataclasses.replace(state.groups[0].watch, detectors=changed))
    with pytest.raises(AssertionError, match=r"groups\[0\]\.watch\.detectors\.running\[0, 0\]"):
        assert_same_state(dataclasses.replace(state, groups=(group, *state.groups[1:])), exact.state())
