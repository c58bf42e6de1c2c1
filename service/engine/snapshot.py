"""What readers see: an immutable snapshot of every channel, with its quality and its /snapshot fragment.

The engine replaces the snapshot after a micro-batch; API handlers read the
latest one without locks. Each channel carries its member of the flat
``GET /api/v1/snapshot`` document ready-made (``fragment``), so that document
is a join of bytes, whatever the channel count.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from estimator import CONDITION_LIMIT, ChannelView
from service.alarms.alarm_table import NO_ALARMS, AlarmTable
from service.engine.quality import Quality, QualityReason, estimates_shown

__all__ = ["CONDITION_LIMIT", "REFUSED_IN_A_ROW", "ChannelEntries", "ChannelEntry", "FragmentWriter", "Snapshot",
           "channel_quality"]


@dataclass(frozen=True)
class ChannelEntry:
    """What readers see of one channel."""

    view: ChannelView
    quality: Quality
    quality_reason: QualityReason
    updated_at: float | None     # wall-clock time of the last applied sample
    fragment: bytes              # its member of the flat /snapshot document


class _Start:
    """The entries of every channel as the first snapshot made them (immutable).

    ``own``: the entries of channels with state of their own. The others, as built, share a template entry per
    settings object (``templates[which[k]]`` for the channel at position k; -1: own): their entries are made when
    read, their fragments (``fragments[k]``, every channel's) once, here.
    """

    def __init__(self, positions: Mapping[str, int], channel_ids: Sequence[str], own: dict[str, ChannelEntry],
                 alike: Sequence[tuple[ChannelEntry, Sequence[str]]]) -> None:
        self.positions = positions
        self.channel_ids = channel_ids
        self.own = own
        self.templates = [template for template, _ in alike]
        self.which = np.full(len(channel_ids), -1, dtype=np.int32)
        self.fragments: list[bytes] = [b""] * len(channel_ids)
        for cid, entry in own.items():
            self.fragments[positions[cid]] = entry.fragment
        for t, (template, members) in enumerate(alike):
            # A fragment is the channel's name, then its member body: the same for every channel as built.
            body = template.fragment[len(_name(template.view.channel)):]
            for cid in members:
                k = positions[cid]
                self.which[k] = t
                self.fragments[k] = _name(cid) + body

    def entry(self, channel: str) -> ChannelEntry:
        k = self.positions[channel]
        t = int(self.which[k])
        if t < 0:
            return self.own[channel]
        template = self.templates[t]
        view = replace(template.view, channel=channel, refused={}, detectors=dict(template.view.detectors))
        return ChannelEntry(view, template.quality, template.quality_reason, None, self.fragments[k])


def _name(channel: str) -> bytes:
    """``"<channel>":``, the start of a channel's fragment."""
    return json.dumps(channel).encode() + b":"


class ChannelEntries(Mapping[str, ChannelEntry]):
    """Every channel's entry of one snapshot, in channel order: those refreshed since the start, and the others as
    the start made them (:meth:`at_start`: 100,000 channels as built share a handful of views, each entry made when
    read). Immutable; :meth:`updated` gives the next snapshot's, copying only the refreshed entries."""

    def __init__(self, start: _Start, refreshed: dict[str, ChannelEntry]) -> None:
        self._start = start
        self._refreshed = refreshed

    @classmethod
    def at_start(cls, positions: Mapping[str, int], channel_ids: Sequence[str], own: dict[str, ChannelEntry],
                 alike: Sequence[tuple[ChannelEntry, Sequence[str]]]) -> ChannelEntries:
        """The first snapshot's: ``own`` entries, and channels as built with their shared template entry each.

        Parameters
        ----------
        positions : channel id -> its place in ``channel_ids``
        channel_ids : every channel, in order
        own : channel id -> entry, of the channels with state of their own
        alike : (template entry, channel ids): the template is each member's entry but for its channel
        """
        return cls(_Start(positions, channel_ids, own, alike), {})

    def __getitem__(self, channel: str) -> ChannelEntry:
        entry = self._refreshed.get(channel)
        return entry if entry is not None else self._start.entry(channel)

    def __iter__(self) -> Iterator[str]:
        return iter(self._start.channel_ids)

    def __len__(self) -> int:
        return len(self._start.channel_ids)

    def __contains__(self, channel: object) -> bool:
        return channel in self._start.positions

    def updated(self, fresh: Mapping[str, ChannelEntry]) -> ChannelEntries:
        """These entries with ``fresh`` ones in place of theirs (a new object; this one is unchanged)."""
        return ChannelEntries(self._start, {**self._refreshed, **fresh})

    def refreshed(self) -> Mapping[str, ChannelEntry]:
        """The entries refreshed since the start (the others' quality cannot age: they never had data)."""
        return self._refreshed

    def fragments(self) -> list[bytes]:
        """Every channel's fragment, in channel order."""
        parts = self._start.fragments.copy()
        positions = self._start.positions
        for channel, entry in self._refreshed.items():
            parts[positions[channel]] = entry.fragment
        return parts

    def quality_counts(self) -> Counter[Quality]:
        """Channels by quality."""
        start = self._start
        counts: Counter[Quality] = Counter()
        refreshed = self._refreshed
        positions = start.positions
        stale_templates = np.zeros(len(start.channel_ids), dtype=bool)
        for channel, entry in refreshed.items():
            counts[entry.quality] += 1
            stale_templates[positions[channel]] = True
        for channel, entry in start.own.items():
            if channel not in refreshed:
                counts[entry.quality] += 1
        which = start.which[~stale_templates]
        for t, n in enumerate(np.bincount(which[which >= 0], minlength=len(start.templates)).tolist()):
            counts[start.templates[t].quality] += n
        return counts


@dataclass(frozen=True)
class Snapshot:
    """An immutable picture of every channel, replaced after each batch."""

    version: int
    created_at: float
    channels: ChannelEntries
    alarms: AlarmTable = NO_ALARMS        # a frozen copy of every alarm, when the engine keeps an alarm book


# Refused samples in a row (none applied between them) after which a channel's estimates are no longer
# "Good": its data arrive but none of it is used, so what the estimates say is getting old.
REFUSED_IN_A_ROW = 5


def channel_quality(view: ChannelView, updated_at: float | None, now: float,
                    stale_after: float, refused_in_a_row: int = 0) -> tuple[Quality, QualityReason]:
    """Quality family and reason (OPC UA Good / Uncertain / Bad) of a channel's estimates.

    ``refused_in_a_row`` counts the channel's samples refused since it last applied one: from
    ``REFUSED_IN_A_ROW`` on, the channel is ``samples_refused`` (Bad with no estimate yet, else Uncertain).
    """
    refusing = refused_in_a_row >= REFUSED_IN_A_ROW
    if view.applied == 0:
        return Quality.BAD, QualityReason.SAMPLES_REFUSED if refusing else QualityReason.NO_DATA
    if not view.identifiable or not all(map(math.isfinite, view.parameters.tolist())):
        return Quality.BAD, QualityReason.NOT_IDENTIFIABLE
    if refusing:
        return Quality.UNCERTAIN, QualityReason.SAMPLES_REFUSED
    if updated_at is not None and now - updated_at > stale_after:
        return Quality.UNCERTAIN, QualityReason.STALE
    if not view.dof >= 1.0:
        return Quality.UNCERTAIN, QualityReason.WARMING_UP
    if not view.information_condition <= CONDITION_LIMIT:
        return Quality.UNCERTAIN, QualityReason.LOW_EXCITATION
    return Quality.GOOD, QualityReason.NONE


def _number(value: float | None) -> str:
    """A float as JSON text: ``repr`` is JSON's number syntax; NaN, infinity and None are null."""
    return repr(float(value)) if value is not None and math.isfinite(value) else "null"


class FragmentWriter:
    """``"<id>": {...}``, a channel's member of the flat /snapshot document, from a template made once.

    The names never change, so each term list's template holds them already quoted (and each channel's name is
    quoted once) and only the numbers are formatted per call: this runs for every touched channel on every
    snapshot. A template per term list, not per channel: 100,000 channels alike share one.
    """

    def __init__(self) -> None:
        self._templates: dict[tuple[str, ...], str] = {}
        self._names: dict[str, bytes] = {}

    @staticmethod
    def _template(terms: tuple[str, ...]) -> str:
        names = [json.dumps(term).replace("%", "%%") for term in terms]
        members = ", ".join(f"{name}: %s" for name in names)
        return (f'{{"quality": "%s", "quality_reason": "%s", '
                f'"updated_at": %s, "t": %s, "samples": %d, "rejected": %d, '
                f'"parameters": {{{members}}}, "std_errors": {{{members}}}, '
                f'"noise_sigma": %s, "residual_sd": %s}}')

    def write(self, view: ChannelView, quality: Quality, reason: QualityReason, updated_at: float | None) -> bytes:
        template = self._templates.get(view.terms)
        if template is None:
            template = self._templates[view.terms] = self._template(view.terms)
        name = self._names.get(view.channel)
        if name is None:
            name = self._names[view.channel] = _name(view.channel)
        n = len(view.terms)
        if estimates_shown(quality):
            estimates = [_number(v) for v in view.parameters.tolist() + view.std_errors.tolist()]
            residual_sd = _number(view.residual_sd)
        else:
            estimates = ["null"] * (2 * n)
            residual_sd = "null"
        values = (quality, reason, _number(updated_at), _number(view.last_t), view.applied,
                  sum(view.refused.values()), *estimates, _number(view.noise_sigma), residual_sd)
        return name + (template % values).encode()
