"""Snapshot entries in chunks: a new snapshot copies only touched chunks, and the /snapshot body rejoins only them."""

from __future__ import annotations

import json

from estimator import ChannelBank, ChannelSettings, SampleColumns
from service.api.channel_routes import FlatSnapshot
from service.engine.channel_entries import CHUNK, ChannelEntries
from service.engine.snapshot import ChannelEntry, FragmentWriter, Snapshot, channel_quality

N = 2 * CHUNK + 5                          # three chunks, the last one short


def _entries(bank: ChannelBank, channels: list[str], writer: FragmentWriter) -> dict[str, ChannelEntry]:
    out = {}
    for block in bank.view_blocks(channels):
        for k, cid in enumerate(block.channels):
            quality, reason = channel_quality(block, k, None, 0.0, 600.0)
            out[cid] = ChannelEntry(block, k, quality, reason, None, writer)
    return {cid: out[cid] for cid in channels}


def test_replacing_entries_copies_only_their_chunks_and_keeps_the_channel_order() -> None:
    ids = [f"c{k}" for k in range(N)]
    bank = ChannelBank({cid: ChannelSettings(terms=("1",)) for cid in ids})
    writer = FragmentWriter()
    first = ChannelEntries.of(_entries(bank, ids, writer))
    assert list(first) == ids and len(first) == N and len(first.chunks) == 3
    touched = [ids[3], ids[CHUNK + 7]]
    fresh = _entries(bank, touched, writer)
    second = first.replaced(fresh)
    assert list(second) == ids
    assert [a is b for a, b in zip(first.chunks, second.chunks, strict=True)] == [False, False, True]
    assert second[ids[3]] is fresh[ids[3]] and first[ids[3]] is not fresh[ids[3]]     # the old one unchanged
    assert all(second[cid] is first[cid] for cid in ids if cid not in touched)
    assert "nope" not in second and second.get("nope") is None


def test_the_snapshot_body_after_a_partial_rejoin_equals_a_whole_join() -> None:
    ids = [f"c{k}" for k in range(N)]
    bank = ChannelBank({cid: ChannelSettings(terms=("1",)) for cid in ids})
    writer = FragmentWriter()
    entries = ChannelEntries.of(_entries(bank, ids, writer))
    flat = FlatSnapshot()
    flat.body(Snapshot(1, 10.0, entries))
    bank.apply_columns({ids[CHUNK + 1]: _one_sample()})          # one channel changes: samples 0 -> 1
    changed = entries.replaced(_entries(bank, [ids[CHUNK + 1]], writer))
    body = flat.body(Snapshot(2, 11.0, changed))
    whole = json.loads(b'{"channels": {' + b",".join(e.fragment for e in changed.values()) + b"}}")
    document = json.loads(body)
    assert document["version"] == 2 and document["channels"] == whole["channels"]
    assert list(document["channels"]) == ids
    assert document["channels"][ids[CHUNK + 1]]["samples"] == 1 and document["channels"][ids[0]]["samples"] == 0


def _one_sample() -> SampleColumns:
    return SampleColumns([1.5], {}, [100.0], [None], [None], [None])
