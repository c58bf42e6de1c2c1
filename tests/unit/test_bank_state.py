"""A bank's state exported and imported mid-stream continues exactly as the uninterrupted bank."""

from __future__ import annotations

import json

import numpy as np

from estimator.channels.bank_state import export_state, import_state
from estimator.channels.channel_bank import ChannelBank
from tests.property.test_columns_match_exact_path import PLANT, _sample
from tests.support.state_equality import assert_same_state


def _stream(seed: int, rounds: int, faults: float = 0.05) -> list:
    rng = np.random.default_rng(seed)
    from tests.property.test_columns_match_exact_path import FAULTS
    return [_sample(rng, cid, k, str(rng.choice(FAULTS)) if rng.random() < faults else None)
            for k in range(1, rounds + 1) for cid in PLANT]


def _roundtrip(bank: ChannelBank, plant: dict = PLANT) -> tuple[ChannelBank, list[str]]:
    arrays, meta = export_state(bank)
    meta = json.loads(json.dumps(meta))          # as stored: through JSON
    restored = ChannelBank(plant)
    return restored, import_state(restored, arrays, meta)


def test_restored_bank_continues_bit_for_bit_with_detectors_baselines_and_lag_buffers() -> None:
    samples = _stream(3, 80)
    whole = ChannelBank(PLANT)
    whole.apply(samples)
    first = ChannelBank(PLANT)
    first.apply(samples[:300])
    assert any(first.baseline_version(c) for c in PLANT)             # some baselines and conditions exist
    restored, fresh = _roundtrip(first)
    assert fresh == []
    assert_same_state(restored.state(), first.state())
    restored.apply(samples[300:])
    assert_same_state(restored.state(), whole.state())
    for cid in PLANT:
        assert [b.version for b in restored.baselines(cid)] == [b.version for b in whole.baselines(cid)]


def test_export_holds_copies_and_a_changed_configuration_keeps_what_it_can() -> None:
    bank = ChannelBank(PLANT)
    bank.apply(_stream(4, 30))
    arrays, meta = export_state(bank)
    before = {k: v.copy() for k, v in arrays.items()}
    bank.apply(_stream(5, 5))
    assert all(np.array_equal(before[k], arrays[k], equal_nan=True) for k in arrays)   # not views of live state
    plant = {k: v for k, v in PLANT.items() if k != "quad"}
    plant["newcomer"] = PLANT["lin"]
    plant["arx"] = PLANT["lin"]                   # same id, another shape: starts afresh
    restored = ChannelBank(plant)
    fresh = import_state(restored, arrays, json.loads(json.dumps(meta)))
    assert sorted(fresh) == ["arx", "newcomer"]
    views, original = restored.view(), ChannelBank(PLANT)
    import_state(original, arrays, json.loads(json.dumps(meta)))
    assert views["lin"].parameters.tobytes() == original.view()["lin"].parameters.tobytes()
    assert views["newcomer"].applied == 0
