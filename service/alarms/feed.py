"""From the bank's detector events to the alarm book (the engine thread; offline, the what-if on sample time).

Everything here follows the samples, in their order, so a run reapplied from
a checkpoint and its input log journals exactly the transitions the
uninterrupted run journaled (with the same times: a transition's time is its
sample's, when the sample has one):

* a condition change becomes :meth:`AlarmBook.condition`, with its evidence
  (statistic, limit, onset, the baseline version in force, sample time);
* a channel without a baseline (commissioning, or after a reset) has its
  detector alarms suppressed by design; a new baseline releases them;
* when the drift test can no longer judge the estimates (too poorly excited,
  not identifiable), the drift alarm is suppressed by design until it can.

The one judgement made on the wall clock is staleness (no data for
``alarms.stale_after`` seconds): :meth:`judge` at each snapshot.
"""

from __future__ import annotations

import math

from estimator import DETECTOR_KINDS, ChannelEvent
from service.alarms.lifecycle import AlarmBook, Evidence

__all__ = ["AlarmFeed"]

_DETECTORS = [k for k in DETECTOR_KINDS if k != "drift"]


class AlarmFeed:
    """Keeps the alarm book in step with the engine's channels."""

    def __init__(self, book: AlarmBook, stale_after: float) -> None:
        self.book = book
        self._stale_after = stale_after
        self.stale: dict[str, bool] = {}
        self.unjudged: set[str] = set()            # channels whose drift test cannot judge now

    def hold_uncommissioned(self, channels: dict[str, bool], now: float) -> None:
        """At a fresh start: suppress the detector alarms of every channel without a baseline (value False).

        One bulk suppression (:meth:`AlarmBook.suppress_many`): the journal's entries of a channel at a time, as
        suppressing channel by channel would make them, held as one run.
        """
        held = [channel for channel, has_baseline in channels.items() if not has_baseline]
        self.book.suppress_many(held, DETECTOR_KINDS, now, "commissioning: no baseline yet")

    def take(self, events: list[ChannelEvent], now: float, baselines: dict[str, int | None]) -> None:
        """Events from :meth:`ChannelBank.take_events`, in order; ``baselines`` maps channel -> version."""
        for event in events:
            channel = event.channel
            condition, notice = event.condition, event.notice
            if condition is not None:
                at = condition.t if math.isfinite(condition.t) else now
                evidence = Evidence(condition.statistic, condition.limit,
                                    None if math.isnan(condition.onset) else condition.onset,
                                    baselines.get(channel), None if math.isnan(condition.t) else condition.t)
                self.book.condition(channel, condition.kind, condition.active, at, evidence)
                continue
            if notice is None:
                continue
            at = notice.t if math.isfinite(notice.t) else now
            if notice.kind == "baseline":
                self.book.suppress(channel, _DETECTORS, False, at, f"baseline v{notice.baseline.version} in force"
                                   if notice.baseline is not None else "baseline in force")
                if channel not in self.unjudged:
                    self.book.suppress(channel, ["drift"], False, at, "baseline in force")
            elif notice.kind == "restart":
                self.unjudged.discard(channel)
                self.book.suppress(channel, DETECTOR_KINDS, True, at, "reset: commissioning again")
            elif notice.kind == "judged" and notice.judged is not None:
                if notice.judged:
                    self.unjudged.discard(channel)
                else:
                    self.unjudged.add(channel)
                self.book.suppress(channel, ["drift"], not notice.judged, at,
                                   "judged again" if notice.judged else "not judged: too little excitation")

    def judge_staleness(self, channel: str, stale: bool, updated_at: float | None, last_t: float | None,
                        now: float) -> None:
        """The stale alarm from the channel's quality as the snapshot judged it (wall clock ``now``).

        ``updated_at`` is when its last sample was applied (wall clock), ``last_t`` that sample's time.
        """
        if self.stale.get(channel, False) != stale:
            self.stale[channel] = stale
            silence = math.nan if updated_at is None else now - updated_at
            self.book.condition(channel, "stale", stale, now, Evidence(silence, self._stale_after, t=last_t))
