"""From the bank's detector events and each channel's quality to the alarm book (engine thread only).

* a condition change becomes :meth:`AlarmBook.condition`, with its evidence
  (statistic, limit, onset, the baseline version in force, sample time);
* a channel without a baseline (commissioning) has its detector alarms
  suppressed by design, and one too poorly excited to judge (quality reason
  ``low_excitation``) its drift alarm;
* a channel whose quality is ``stale`` (no data for ``alarms.stale_after``
  seconds) has its ``stale`` condition active.
"""

from __future__ import annotations

import math

from estimator.channel_bank import ChannelEvent
from estimator.detectors import KINDS
from service.alarms import AlarmBook, Evidence
from service.snapshot import ChannelEntry

__all__ = ["AlarmFeed"]

# Held back by design only when excitation is lost; before the first samples (not identifiable yet, no data)
# the detector holds its judgement anyway, and suppressing then would only churn the journal.
_UNJUDGEABLE = frozenset({"low_excitation"})


class AlarmFeed:
    """Keeps the alarm book in step with the engine's channels."""

    def __init__(self, book: AlarmBook, stale_after: float) -> None:
        self.book = book
        self._stale_after = stale_after
        self._held: dict[str, tuple[bool, bool]] = {}      # channel -> (detectors held, drift held)
        self._stale: dict[str, bool] = {}

    def take(self, events: list[ChannelEvent], now: float, baselines: dict[str, int | None]) -> None:
        """Condition changes from :meth:`ChannelBank.take_events`; ``baselines`` maps channel -> version."""
        for event in events:
            condition = event.condition
            if condition is None:
                continue
            evidence = Evidence(condition.statistic, condition.limit,
                                None if math.isnan(condition.onset) else condition.onset,
                                baselines.get(event.channel), None if math.isnan(condition.t) else condition.t)
            self.book.condition(event.channel, condition.kind, condition.active, now, evidence)

    def judge(self, channel: str, entry: ChannelEntry, now: float) -> None:
        """Design suppression and staleness from the channel's latest snapshot entry."""
        commissioning = entry.view.baseline is None
        drift_held = commissioning or entry.quality_reason in _UNJUDGEABLE
        held = (commissioning, drift_held)
        if self._held.get(channel) != held:
            self._held[channel] = held
            detectors = [k for k in KINDS if k != "drift"]
            self.book.suppress(channel, detectors, commissioning, now,
                               "commissioning: no baseline yet" if commissioning else "baseline in force")
            self.book.suppress(channel, ["drift"], drift_held, now,
                               "commissioning: no baseline yet" if commissioning else
                               f"not judged: {entry.quality_reason}" if drift_held else "judged again")
        stale = entry.quality_reason == "stale"
        if self._stale.get(channel, False) != stale:
            self._stale[channel] = stale
            silence = math.nan if entry.updated_at is None else now - entry.updated_at
            self.book.condition(channel, "stale", stale, now,
                                Evidence(silence, self._stale_after, t=entry.view.last_t))
