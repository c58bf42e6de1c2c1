"""The engine's snapshot: the first one is what one made from every channel's own view would be; later ones replace
the refreshed channels only."""

from __future__ import annotations

import json

from estimator import ChannelBank, ChannelSettings
from service.alarms.lifecycle import AlarmBook
from service.broker_link.messages import Message
from service.config.alarm_settings import ALARM_KINDS
from service.engine.channel_entries import ChannelEntries
from service.engine.snapshot import ChannelEntry
from service.engine.writer import Engine
from tests.support.state_equality import assert_same_state

ALIKE = ChannelSettings(terms=("1", "u"), forgetting_factor=0.99)
OTHER = ChannelSettings(terms=("1", "u", "u^2"))
CHANNELS = {"a": ALIKE, "b": ALIKE, "based": ALIKE, "c": OTHER, "d": ALIKE, "e": OTHER}


def _baseline(bank: ChannelBank) -> None:
    bank.set_baseline("based", [1.0, 0.5], noise_sigma=0.1)


def _engine() -> Engine:
    alarms = AlarmBook({cid: dict.fromkeys(ALARM_KINDS, "low") for cid in CHANNELS})
    return Engine(CHANNELS, alarms=alarms, prepare=_baseline, clock=lambda: 5000.0)


def _assert_same_entry(got: ChannelEntry, expected: ChannelEntry) -> None:
    assert_same_state(got.view, expected.view)
    assert (got.quality, got.quality_reason, got.updated_at) == (expected.quality, expected.quality_reason,
                                                                  expected.updated_at)
    assert got.fragment == expected.fragment


def test_the_first_snapshot_is_what_every_channels_own_view_makes() -> None:
    engine = _engine()
    first = engine.snapshot.channels
    engine.publisher.touch_all()
    engine.publisher.flush()                             # every channel from its own view
    rebuilt = engine.snapshot.channels
    assert list(first) == list(rebuilt) == list(CHANNELS) and len(first) == len(CHANNELS)
    for cid in CHANNELS:
        _assert_same_entry(first[cid], rebuilt[cid])
        assert json.loads(b"{" + first[cid].fragment + b"}")[cid]["samples"] == 0
    assert [e.fragment for e in first.values()] == [e.fragment for e in rebuilt.values()]
    assert first["based"].view.baseline is not None and first["a"].view.baseline is None
    assert "nobody" not in first and first.get("nobody") is None


def test_a_refreshed_channel_replaces_its_own_entry_only() -> None:
    engine = _engine()
    first = engine.snapshot.channels
    sample = {"t": 1.0, "y": 2.0, "u": {"u": 0.5}}
    engine._process([Message("b", json.dumps(sample).encode(), "http", received=4000.0)])
    engine.publisher.flush()
    later = engine.snapshot.channels
    assert isinstance(later, ChannelEntries) and later is not first
    assert later["b"].view.applied == 1 and first["b"].view.applied == 0        # the first is unchanged
    for cid in CHANNELS.keys() - {"b"}:
        assert later[cid] is first[cid]                                       # not refreshed: the very entry
    assert later["b"] is not first["b"] and later["b"].view.applied == 1
