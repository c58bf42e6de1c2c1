"""Offline what-if: the alarm transitions the detectors would have produced on a history.

``rwls replay`` runs the same detectors, with the same channel tables, as the
live service; this feeds their condition changes to an alarm book with no
operator (nobody acknowledges, nothing is shelved), so an engineer can tune
limits on last month's data before going live. Times are the samples' own
(a history without times counts samples instead).
"""

from __future__ import annotations

import math

from estimator import ChannelBank
from service.alarms.lifecycle import AlarmBook, Evidence
from service.config.settings import RwlsConfig

__all__ = ["WhatIf"]


class WhatIf:
    """Collects the alarm transitions of an offline run, per channel."""

    def __init__(self, config: RwlsConfig) -> None:
        self._book = AlarmBook({cid: ch.priorities() for cid, ch in config.channels.items()})
        self._samples: dict[str, int] = {}

    def observe(self, bank: ChannelBank, channel: str, t: float | None) -> None:
        """After one sample of ``channel``: take the bank's detector events."""
        index = self._samples.get(channel, 0)
        self._samples[channel] = index + 1
        for event in bank.take_events():
            c = event.condition
            if c is None:
                continue
            at = c.t if not math.isnan(c.t) else float(index)
            self._book.condition(event.channel, c.kind, c.active, at,
                                 Evidence(c.statistic, c.limit, None if math.isnan(c.onset) else c.onset,
                                          bank.baseline_version(event.channel), None if math.isnan(c.t) else c.t))

    def transitions(self, channel: str) -> list[dict[str, object]]:
        """``[{"kind", "state", "t" or "sample", "statistic", "limit", "onset"}]`` in time order."""
        out: list[dict[str, object]] = []
        for entry in self._book.journal:
            if entry.channel != channel:
                continue
            e = entry.evidence
            item: dict[str, object] = {"kind": entry.kind, "state": entry.after, "action": entry.action}
            if e.t is not None:
                item["t"] = e.t
            else:
                item["sample"] = int(entry.time)
            item.update(statistic=e.statistic, limit=e.limit, onset=e.onset, baseline=e.baseline)
            out.append(item)
        return out
