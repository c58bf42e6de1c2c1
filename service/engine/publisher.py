"""The engine's snapshot publisher: turns the bank's views into the immutable :class:`Snapshot` readers see.

The engine tells it which channels changed (:meth:`touch`) and that the alarm
book changed (:meth:`alarms_changed`); it builds a new snapshot from those
channels only, reusing every other channel's entry, and judges each refreshed
channel's quality and staleness on the way. Under load it publishes at most
every ``interval`` seconds, and at once whenever the engine's queue runs empty.
Engine thread only; readers take :attr:`snapshot`, which is replaced, never
mutated.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence

from estimator import ChannelBank, ViewBlock
from service.alarms.alarm_table import NO_ALARMS
from service.alarms.feed import AlarmFeed
from service.alarms.lifecycle import AlarmBook
from service.engine.activity import ChannelActivity
from service.engine.channel_entries import ChannelEntries
from service.engine.snapshot import ChannelEntry, FragmentWriter, Snapshot, channel_quality

__all__ = ["PublishHook", "SnapshotPublisher"]

# Called with the refreshed entries and the wall-clock time after each snapshot (history rows).
PublishHook = Callable[[dict[str, ChannelEntry], float], None]


class SnapshotPublisher:
    """Builds and replaces the engine's snapshot.

    Parameters
    ----------
    bank : the channels whose views it publishes
    activity : the engine's per-channel traffic record (quality)
    stale_after : seconds without data after which a channel's quality is Uncertain
    interval : under load, a new snapshot at most this often (seconds)
    clock : wall clock (seconds)
    alarms, feed : the alarm book whose alarms the snapshot carries, and the feed that judges staleness
    hooks : called after each snapshot with the refreshed entries
    """

    def __init__(self, bank: ChannelBank, activity: ChannelActivity, *, stale_after: float, interval: float,
                 clock: Callable[[], float], alarms: AlarmBook | None = None, feed: AlarmFeed | None = None,
                 hooks: Sequence[PublishHook] = ()) -> None:
        self._bank = bank
        self._activity = activity
        self._stale_after = stale_after
        self._interval = interval
        self._clock = clock
        self._alarms = alarms
        self._feed = feed
        self._hooks = tuple(hooks)
        self._fragments = FragmentWriter()
        self._pending: set[str] = set()          # channels changed since the last snapshot
        self._alarms_changed = False
        self._last_publish = 0.0
        now = clock()
        self._snapshot = Snapshot(0, now, ChannelEntries.of(self._entries(bank.channel_ids, now)),
                                  alarms.alarms() if alarms is not None else NO_ALARMS)

    @property
    def snapshot(self) -> Snapshot:
        """The latest snapshot (replaced, never mutated)."""
        return self._snapshot

    def touch(self, channel: str) -> None:
        """Mark a channel for the next snapshot."""
        self._pending.add(channel)

    def touch_all(self) -> None:
        self._pending.update(self._bank.channel_ids)

    def alarms_changed(self) -> None:
        """The alarm book changed: the next snapshot carries a fresh copy of its alarms."""
        self._alarms_changed = True

    def flush(self) -> None:
        """Publish now if anything changed."""
        if self._pending or self._alarms_changed:
            self._publish(sorted(self._pending))
            self._pending.clear()

    def flush_if_due(self, queue_empty: bool) -> None:
        """After a batch: publish when the queue ran empty, else at most every ``interval``."""
        if queue_empty or time.monotonic() - self._last_publish >= self._interval:
            self.flush()

    def refresh_quality(self) -> None:
        """Re-judge staleness while idle; publish only the channels whose quality changed.

        Only time changes a quality between publishes (everything else that does touches the channel), and
        time only makes a channel stale: so only a channel not judged stale whose last sample is now older
        than ``stale_after`` is judged again (a few look-ups per channel a second, at 100,000 channels).
        """
        now, stale_after = self._clock(), self._stale_after
        refusing = self._activity.refused_in_a_row
        for chunk in self._snapshot.channels.chunks:
            for cid, entry in chunk.items():
                updated_at = entry.updated_at          # the test channel_quality makes, in the same words
                if updated_at is None or not now - updated_at > stale_after or entry.quality_reason == "stale":
                    continue
                if entry.judged(now, stale_after, refusing.get(cid, 0)) != (entry.quality, entry.quality_reason):
                    self._pending.add(cid)
        self.flush()

    def _entries(self, channels: Sequence[str], now: float) -> dict[str, ChannelEntry]:
        """Fresh entries of ``channels``, in that order (the blocks come group by group)."""
        blocks: Sequence[ViewBlock] = self._bank.view_blocks(channels)
        activity, feed, fragments = self._activity, self._feed, self._fragments
        updated, refusing = activity.updated_at, activity.refused_in_a_row
        entries = {}
        for block in blocks:
            for k, cid in enumerate(block.channels):
                updated_at = updated.get(cid)
                quality, reason = channel_quality(block, k, updated_at, now, self._stale_after, refusing.get(cid, 0))
                entries[cid] = ChannelEntry(block, k, quality, reason, updated_at, fragments)
                if feed is not None:
                    feed.judge_staleness(cid, reason == "stale", updated_at, block.last_t[k], now)
        return entries if len(blocks) < 2 else {cid: entries[cid] for cid in channels}

    def _publish(self, channels: list[str]) -> None:
        self._last_publish = time.monotonic()
        now = self._clock()
        fresh = self._entries(channels, now)
        entries = self._snapshot.channels.replaced(fresh)
        for hook in self._hooks:
            hook(fresh, now)
        alarms = self._snapshot.alarms
        if self._alarms_changed and self._alarms is not None:
            self._alarms_changed = False
            alarms = self._alarms.alarms()
        self._snapshot = Snapshot(self._snapshot.version + 1, now, entries, alarms)
