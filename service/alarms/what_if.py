"""Offline what-if: the alarm transitions the detectors would have produced on a history.

``rwls replay`` runs the same detectors, with the same channel tables, as the
live service, and this drives the same :class:`~service.alarms.feed.AlarmFeed`
the engine drives, so an engineer can tune limits on last month's data before
going live and see what the operators would have seen. It runs on sample time:
a transition's time is its sample's own ``t`` (a history without times counts
each channel's applied samples instead, from 0). Design suppression applies as
it does live: a channel without a baseline has its detector alarms held until
commissioning gives it one, and the drift alarm is held while the drift test
cannot judge the estimates. Nobody acknowledges or shelves, and staleness is
not judged: it is the wall clock's judgement of a live feed, not of a history.
"""

from __future__ import annotations

import math

from estimator import ChannelBank, ChannelEvent
from service.alarms.feed import AlarmFeed
from service.alarms.lifecycle import Alarm, AlarmBook, AlarmState, JournalEntry
from service.config.settings import RwlsConfig

__all__ = ["WhatIf"]

# Holding back or releasing an alarm that is quiet either way changes nothing an operator sees: not listed.
_QUIET = frozenset({AlarmState.NORMAL, AlarmState.SUPPRESSED})


def _listed(entry: JournalEntry) -> bool:
    """Condition changes, and design suppressions that hide or bring back an alarm an operator would see."""
    return entry.action in ("condition_on", "condition_off") or not {entry.before, entry.after} <= _QUIET


class WhatIf:
    """Collects the alarm transitions of an offline run, per channel.

    Call :meth:`start` once the configured baselines are in force, then
    :meth:`observe` after every applied sample.
    """

    def __init__(self, config: RwlsConfig) -> None:
        self._book = AlarmBook(config.alarm_priorities())
        self._feed = AlarmFeed(self._book, config.alarms.stale_after)
        self._samples: dict[str, int] = {}
        self._held: dict[str, bool] | None = None     # channel -> has a baseline, until the first sample
        self._timed = False                           # whether the sample being observed has a time
        self._heard: list[tuple[JournalEntry, bool]] = []   # each transition, and whether its time is a t
        self._book.listen(self._hear)

    def start(self, bank: ChannelBank) -> None:
        """As the engine starts: the configured baselines are not news; channels without one are held.

        The hold is journaled at the first sample's time, the start of the history.
        """
        bank.take_events()
        self.start_held({c: bank.baseline_version(c) is not None for c in bank.channel_ids})

    def start_held(self, held: dict[str, bool]) -> None:
        """:meth:`start` given each channel's ``has a baseline`` (its bank's events already taken)."""
        self._held = held

    def observe(self, bank: ChannelBank, channel: str, t: float | None) -> None:
        """After one applied sample of ``channel`` at sample time ``t`` (None: unknown): take the bank's events."""
        events = bank.take_events()
        self.observe_events(channel, t, events, {c: bank.baseline_version(c) for c in {e.channel for e in events}})

    def observe_events(self, channel: str, t: float | None, events: list[ChannelEvent],
                       versions: dict[str, int | None]) -> None:
        """:meth:`observe` given the bank's events after the sample and the baseline versions of their channels."""
        index = self._samples.get(channel, 0)
        self._samples[channel] = index + 1
        now = float(index) if t is None else t
        self._timed = t is not None
        if self._held is not None:
            self._feed.hold_uncommissioned(self._held, now)
            self._held = None
        if events:
            self._feed.take(events, now, versions)

    def observe_chunk(self, bank: ChannelBank, before: dict[str, int | None], first_t: float) -> None:
        """After a chunk of timed samples applied at once (``rwls replay``'s columnar path): the same transitions
        as :meth:`observe` after each of them.

        ``before`` maps each channel to its baseline version before the chunk, ``first_t`` is the time of the
        chunk's first applied sample (the start of the history, if this is the first chunk).
        """
        self.observe_chunk_events(bank.take_events(), before, first_t)

    def observe_chunk_events(self, events: list[ChannelEvent], before: dict[str, int | None], first_t: float) -> None:
        """:meth:`observe_chunk` given the bank's events after the chunk, in :meth:`ChannelBank.take_events` order.

        Every event of a timed sample carries that sample's time, and each channel's events come in its sample
        order; the baseline version an event is journaled with is the one in force after its sample, as
        :meth:`observe` reads it: the version before the chunk, moved on by the channel's own ``baseline`` and
        ``restart`` notices up to and including that sample's.
        """
        self._timed = True
        if self._held is not None:
            self._feed.hold_uncommissioned(self._held, first_t)
            self._held = None
        versions = dict(before)
        start = 0
        while start < len(events):
            channel, t = events[start].channel, _event_t(events[start])
            end = start + 1
            while end < len(events) and events[end].channel == channel and _event_t(events[end]) == t:
                end += 1
            same_sample = events[start:end]
            version = versions.get(channel)
            for event in same_sample:
                notice = event.notice
                if notice is not None and notice.kind == "baseline" and notice.baseline is not None:
                    version = notice.baseline.version
                elif notice is not None and notice.kind == "restart":
                    version = None
            versions[channel] = version
            self._feed.take(same_sample, t if math.isfinite(t) else first_t, {channel: version})
            start = end

    @property
    def journal(self) -> list[JournalEntry]:
        """Every transition of the run, in order (a copy), as the live alarm book journals them."""
        return list(self._book.journal)

    def transitions(self, channel: str) -> list[dict[str, object]]:
        """``[{"kind", "state", "action", "t" or "sample", "statistic", "limit", "onset", "baseline"}]`` in order.

        Design suppressions carry their ``reason`` too, and the evidence of the condition they set aside or
        bring back; those of an alarm quiet before and after are left out.
        """
        out: list[dict[str, object]] = []
        for entry, timed in self._heard:
            if entry.channel != channel or not _listed(entry):
                continue
            e = entry.evidence
            item: dict[str, object] = {"kind": entry.kind, "state": entry.after, "action": entry.action}
            if timed:
                item["t"] = entry.time
            else:
                item["sample"] = int(entry.time)
            item.update(statistic=e.statistic, limit=e.limit, onset=e.onset, baseline=e.baseline)
            if entry.action in ("suppress", "release"):
                item["reason"] = entry.comment
            out.append(item)
        return out

    def _hear(self, entry: JournalEntry, alarm: Alarm) -> None:
        self._heard.append((entry, self._timed))


def _event_t(event: ChannelEvent) -> float:
    if event.condition is not None:
        return event.condition.t
    return event.notice.t if event.notice is not None else math.nan
