"""ChannelBank: micro-batches across channels give the bits of one-at-a-time application."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from estimator.channels.channel import ChannelSettings, Sample, WeightRule
from estimator.channels.channel_bank import ChannelBank
from tests.support.state_equality import assert_same_state

SETTINGS = {
    # Same shape (n = 2, sample-count tracker): one group, vectorised together.
    "temp": ChannelSettings(terms=("1", "u"), forgetting_factor=0.999, weighting="tracked", initial_sigma=0.5),
    "dp": ChannelSettings(terms=("1", "u"), forgetting_factor=0.98, covariance_limit=10.0,
                          weight_rules=(WeightRule("u", -0.5, 0.5, 3.0),)),
    "flowish": ChannelSettings(terms=("u", "1"), weighting="sample"),
    # Other shapes: their own groups.
    "flow": ChannelSettings(terms=("1", "u", "u^2"), forgetting_factor=0.995),
    "o2": ChannelSettings(terms=("1", "y[-1]", "u"), forgetting_factor=0.999, weighting="tracked",
                          noise_model_terms=("1", "u")),
    "timed": ChannelSettings(terms=("1", "u"), weighting="tracked", noise_half_life=60.0,
                             noise_half_life_in_seconds=True, noise_robust=True),
}


def _stream(seed: int, count: int) -> list[Sample]:
    """Interleaved samples of every channel, with a few bad ones mixed in."""
    rng = np.random.default_rng(seed)
    samples = []
    for k in range(count):
        for cid in SETTINGS:
            u = float(rng.normal())
            y = 1.0 + 0.5 * u + float(rng.normal(0.0, 0.2))
            t = 1000.0 + 10.0 * k + float(rng.uniform(0.0, 5.0))
            sigma = 0.2 if cid == "flowish" else None
            samples.append(Sample(cid, y, {"u": u}, t, sigma))
        if k % 97 == 13:
            samples.append(Sample("temp", math.nan, {"u": 1.0}, 1000.0 + 10.0 * k + 9.0))
            samples.append(Sample("flow", 1.0, {}, 1000.0 + 10.0 * k + 9.5))
            samples.append(Sample("nobody", 1.0, {"u": 1.0}))
            samples.append(Sample("dp", 1.0, {"u": 1.0}, 0.0))       # out of order
    return samples


@pytest.mark.parametrize("batch", [2, 7, 64, 1000])
def test_micro_batches_give_the_bits_of_one_sample_at_a_time(batch: int) -> None:
    samples = _stream(seed=5, count=300)
    one_by_one, batched = ChannelBank(SETTINGS), ChannelBank(SETTINGS)
    expected = [one_by_one.apply_one(s) for s in samples]
    got = []
    for start in range(0, len(samples), batch):
        got += batched.apply(samples[start:start + batch])
    assert [(o.status, o.reason) for o in got] == [(o.status, o.reason) for o in expected]
    for a, b in zip(got, expected, strict=True):
        assert a.weight == b.weight or (math.isnan(a.weight) and math.isnan(b.weight))
        assert a.innovation == b.innovation or (math.isnan(a.innovation) and math.isnan(b.innovation))
    assert_same_state(batched.state(), one_by_one.state())
    assert len(batched.state().groups) == 4      # the three n = 2 sample-count channels share a group


def test_samples_of_one_channel_keep_their_order_within_a_batch() -> None:
    bank = ChannelBank({"a": ChannelSettings(terms=("1", "y[-1]"))})
    samples = [Sample("a", float(k), {}, float(k)) for k in range(5)]
    outcomes = bank.apply(samples)
    assert [o.status for o in outcomes] == ["warmup", "applied", "applied", "applied", "applied"]
    # y_k = 1 + y_{k-1} exactly: after the warm-up sample the fit is exact.
    view = bank.view()["a"]
    np.testing.assert_allclose(view.parameters, [1.0, 1.0], rtol=1e-12)


def test_unknown_channels_and_bad_samples_are_refused_with_reasons() -> None:
    bank = ChannelBank(SETTINGS)
    outcomes = bank.apply([Sample("nobody", 1.0, {"u": 1.0}), Sample("temp", 1.0, {}),
                           Sample("flowish", 1.0, {"u": 1.0}), Sample("dp", 1.0, {"u": 1e200 * 1e200})])
    assert [o.reason for o in outcomes] == ["unknown_channel", "missing_input", "missing_weight", "non_finite"]
    view = bank.view()
    assert view["temp"].refused == {"missing_input": 1}
    assert view["flowish"].refused == {"missing_weight": 1}


def test_an_overflowing_regressor_in_a_vectorised_round_refuses_only_its_sample() -> None:
    settings = {c: ChannelSettings(terms=("1", "u^2")) for c in ("a", "b", "c")}
    bank = ChannelBank(settings)
    outcomes = bank.apply([Sample("a", 1.0, {"u": 1.0}), Sample("b", 1.0, {"u": 1e200}),
                           Sample("c", 2.0, {"u": 2.0})])
    assert [(o.status, o.reason) for o in outcomes] == [("applied", ""), ("refused", "non_finite"),
                                                         ("applied", "")]


def test_view_reports_every_channel_with_its_settings() -> None:
    bank = ChannelBank(SETTINGS)
    bank.apply(_stream(seed=2, count=100))
    views = bank.view()
    assert list(views) == list(SETTINGS)
    assert views["flow"].terms == ("1", "u", "u^2")
    assert views["temp"].settings is SETTINGS["temp"]
    for view in views.values():
        assert view.identifiable
        assert np.isfinite(view.parameters).all() and np.isfinite(view.std_errors).all()
    # Tracked weighting learns sigma = 0.2 (invented data above); 25 % covers the EWMA's spread
    # over a 200-sample half-life at 100 samples.
    assert views["temp"].noise_sigma == pytest.approx(0.2, rel=0.25)


def test_empty_configuration_is_refused() -> None:
    with pytest.raises(ValueError, match="at least one channel"):
        ChannelBank({})


def test_sequence_numbers_refuse_redeliveries_but_a_refused_sample_blocks_nothing() -> None:
    bank = ChannelBank({"a": ChannelSettings(terms=("1",))})
    outcomes = bank.apply([
        Sample("a", 1.0, {}, 1.0, seq=1),
        Sample("a", 1.0, {}, 2.0, seq=1),              # redelivered
        Sample("a", 1.0, {}, 0.5, seq=9),              # refused for its time: seq 9 is not taken
        Sample("a", 1.0, {}, 3.0, seq=2),
        Sample("a", 1.0, {}, 4.0, seq=0),              # older
    ])
    assert [o.reason or o.status for o in outcomes] == ["applied", "duplicate_seq", "out_of_order", "applied",
                                                         "out_of_order_seq"]


@pytest.mark.parametrize("batched", [False, True])
def test_a_channel_started_on_one_repeated_input_reports_least_squares_once_the_input_moves(batched: bool) -> None:
    # As reported: forgetting 0.995, default settings, the first five samples at u = 51.28, then u spread over
    # 40..60 (y = 2.06 + 0.80 u, noise sd 0.01). Before the fix the parameters were ~1e13 after the second
    # sample and ~1e7 after 135.
    bank = ChannelBank({"c": ChannelSettings(terms=("1", "u"), forgetting_factor=0.995)})
    rng = np.random.default_rng(21)
    u = np.concatenate([np.full(5, 51.28), rng.uniform(40.0, 60.0, 130)])
    y = 2.06 + 0.80 * u + rng.normal(0.0, 0.01, u.size)
    samples = [Sample("c", float(y[k]), {"u": float(u[k])}, float(k)) for k in range(u.size)]
    Z = np.column_stack([np.ones_like(u), u])
    for k, sample in enumerate(samples):
        if batched:
            bank.apply([sample])
        else:
            bank.apply_one(sample)
        view = bank.view()["c"]
        if k < 5:
            # One operating point: not identifiable, said so, and no number made up.
            assert not view.identifiable and np.isnan(view.parameters).all()
            continue
        root = np.sqrt(0.995 ** np.arange(k, -1, -1.0))
        # numpy.linalg.lstsq as reference implementation (the forgotten-weighted rows); rtol 1e-9 for two
        # backward-stable solutions of a problem with cond ~ 1e2.
        expected = np.linalg.lstsq(Z[:k + 1] * root[:, None], y[:k + 1] * root, rcond=None)[0]
        np.testing.assert_allclose(view.parameters, expected, rtol=1e-9)


def test_channels_sharing_one_settings_object_end_as_channels_with_a_copy_each() -> None:
    # A service hands channels configured alike one settings object; the bank works out what follows from it
    # once (parsed terms, detector constants). A copy per channel must end in the same bits.
    shared = {cid: SETTINGS["o2"] for cid in ("a", "b", "c")} | {"d": SETTINGS["temp"]}
    copied = {cid: dataclasses.replace(settings) for cid, settings in shared.items()}
    assert copied["a"] is not copied["b"]
    samples = [dataclasses.replace(s, channel=cid) for s in _stream(seed=9, count=120) if s.channel in ("o2", "temp")
               for cid in (("a", "b", "c") if s.channel == "o2" else ("d",))]
    one, each = ChannelBank(shared), ChannelBank(copied)
    for start in range(0, len(samples), 50):
        one.apply(samples[start:start + 50])
        each.apply(samples[start:start + 50])
    assert_same_state(one.state(), each.state())
    assert one.view()["a"].applied > 0 and one.view()["a"].terms == ("1", "y[-1]", "u")


def test_one_baseline_set_for_many_channels_gives_the_state_of_setting_it_for_each() -> None:
    settings = {cid: SETTINGS["temp"] for cid in ("a", "b", "c")}
    each, many = ChannelBank(settings), ChannelBank(settings)
    for cid in settings:
        each.set_baseline(cid, [1.0, 0.5], noise_sigma=0.2, covariance=[[0.01, 0.0], [0.0, 0.02]], note="given")
    many.set_baselines(list(settings), [1.0, 0.5], noise_sigma=0.2, covariance=[[0.01, 0.0], [0.0, 0.02]],
                       note="given")
    assert_same_state(many.state(), each.state())
    samples = [dataclasses.replace(s, channel=cid) for s in _stream(seed=3, count=40) if s.channel == "temp"
               for cid in settings]
    each.apply(samples)
    many.apply(samples)
    assert_same_state(many.state(), each.state())
