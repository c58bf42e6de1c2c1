"""What readers see: an immutable snapshot of every channel, with its quality and its /snapshot fragment.

The engine replaces the snapshot after a micro-batch; API handlers read the
latest one without locks. Each channel's member of the flat
``GET /api/v1/snapshot`` document (``fragment``) is made once, when first read,
and kept with the channel's entry, so that document is a join of bytes however
many channels it holds; only the channels that changed since it was last read
are formatted again.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

from estimator import CONDITION_LIMIT, ChannelView, ViewBlock
from service.alarms.alarm_table import NO_ALARMS, AlarmTable
from service.engine.channel_entries import ChannelEntries
from service.engine.quality import Quality, QualityReason, estimates_shown

__all__ = ["CONDITION_LIMIT", "REFUSED_IN_A_ROW", "ChannelEntry", "FragmentWriter", "Snapshot", "channel_quality"]


class ChannelEntry:
    """What readers see of one channel: its quality, and its view and /snapshot fragment, made when first read.

    The engine publishes entries for every touched channel after each micro-batch; most are replaced
    before anyone reads them, so each holds its channel's row of a :class:`ViewBlock` (taken in
    whole-array steps) and builds the :class:`ChannelView` and the fragment only when asked. Readers on
    several threads may race to build them: both build the same value and one is kept. Immutable to
    readers: nothing it holds changes after the engine made it.
    """

    __slots__ = ("_block", "_fragment", "_k", "_view", "_writer", "quality", "quality_reason", "updated_at")

    def __init__(self, block: ViewBlock, k: int, quality: Quality, quality_reason: QualityReason,
                 updated_at: float | None, writer: FragmentWriter) -> None:
        self._block, self._k, self._writer = block, k, writer
        self.quality = quality
        self.quality_reason = quality_reason
        self.updated_at = updated_at          # wall-clock time of the last applied sample
        self._view: ChannelView | None = None
        self._fragment: bytes | None = None

    @property
    def view(self) -> ChannelView:
        view = self._view
        if view is None:
            view = self._view = self._block.view(self._k)
        return view

    @property
    def fragment(self) -> bytes:
        """Its member of the flat /snapshot document."""
        fragment = self._fragment
        if fragment is None:
            fragment = self._fragment = self._writer.write(self._block, self._k, self.quality, self.quality_reason,
                                                           self.updated_at)
        return fragment

    @property
    def last_t(self) -> float | None:
        """Time stamp of the channel's newest applied sample (as ``view.last_t``, without building the view)."""
        return self._block.last_t[self._k]

    @property
    def applied(self) -> int:
        """Samples applied (as ``view.applied``)."""
        return self._block.applied[self._k]

    @property
    def rejected(self) -> int:
        """Samples refused, every reason (as ``sum(view.refused.values())``)."""
        return sum(self._block.refused[self._k].values())

    def judged(self, now: float, stale_after: float, refused_in_a_row: int) -> tuple[Quality, QualityReason]:
        """Its quality judged again at ``now`` (staleness moves with the clock)."""
        return channel_quality(self._block, self._k, self.updated_at, now, stale_after, refused_in_a_row)


@dataclass(frozen=True)
class Snapshot:
    """An immutable picture of every channel, replaced after each batch."""

    version: int
    created_at: float
    channels: ChannelEntries                # channel id -> entry, in channel order
    alarms: AlarmTable = NO_ALARMS        # a frozen copy of every alarm, when the engine keeps an alarm book


# Refused samples in a row (none applied between them) after which a channel's estimates are no longer
# "Good": its data arrive but none of it is used, so what the estimates say is getting old.
REFUSED_IN_A_ROW = 5


def channel_quality(block: ViewBlock, k: int, updated_at: float | None, now: float,
                    stale_after: float, refused_in_a_row: int = 0) -> tuple[Quality, QualityReason]:
    """Quality family and reason (OPC UA Good / Uncertain / Bad) of the estimates of ``block``'s ``k``-th channel.

    ``refused_in_a_row`` counts the channel's samples refused since it last applied one: from
    ``REFUSED_IN_A_ROW`` on, the channel is ``samples_refused`` (Bad with no estimate yet, else Uncertain).
    """
    refusing = refused_in_a_row >= REFUSED_IN_A_ROW
    if block.applied[k] == 0:
        return Quality.BAD, QualityReason.SAMPLES_REFUSED if refusing else QualityReason.NO_DATA
    if not block.estimable[k]:
        return Quality.BAD, QualityReason.NOT_IDENTIFIABLE
    if refusing:
        return Quality.UNCERTAIN, QualityReason.SAMPLES_REFUSED
    if updated_at is not None and now - updated_at > stale_after:
        return Quality.UNCERTAIN, QualityReason.STALE
    if not block.dof[k] >= 1.0:
        return Quality.UNCERTAIN, QualityReason.WARMING_UP
    if not block.information_condition[k] <= CONDITION_LIMIT:
        return Quality.UNCERTAIN, QualityReason.LOW_EXCITATION
    return Quality.GOOD, QualityReason.NONE


def _number(value: float | None) -> str:
    """A float as JSON text: ``repr`` is JSON's number syntax; NaN, infinity and None are null."""
    return repr(float(value)) if value is not None and math.isfinite(value) else "null"


class FragmentWriter:
    """``"<id>": {...}``, a channel's member of the flat /snapshot document, from a template made once.

    The names never change, so each channel's template holds them already
    quoted and only the numbers are formatted per call: this runs for every
    touched channel on every snapshot.
    """

    def __init__(self) -> None:
        self._templates: dict[str, str] = {}

    def _template(self, channel: str, terms: tuple[str, ...]) -> str:
        names = [json.dumps(term).replace("%", "%%") for term in terms]
        members = ", ".join(f"{name}: %s" for name in names)
        return (f'{json.dumps(channel).replace("%", "%%")}:{{"quality": "%s", "quality_reason": "%s", '
                f'"updated_at": %s, "t": %s, "samples": %d, "rejected": %d, '
                f'"parameters": {{{members}}}, "std_errors": {{{members}}}, '
                f'"noise_sigma": %s, "residual_sd": %s}}')

    def write(self, block: ViewBlock, k: int, quality: Quality, reason: QualityReason,
              updated_at: float | None) -> bytes:
        """The fragment of ``block``'s ``k``-th channel."""
        channel = block.channels[k]
        template = self._templates.get(channel)
        if template is None:
            template = self._templates[channel] = self._template(channel, block.terms[k])
        n = len(block.terms[k])
        if estimates_shown(quality):
            estimates = [_number(v) for v in block.parameters[k].tolist() + block.std_errors[k].tolist()]
            residual_sd = _number(block.residual_sd[k])
        else:
            estimates = ["null"] * (2 * n)
            residual_sd = "null"
        values = (quality, reason, _number(updated_at), _number(block.last_t[k]), block.applied[k],
                  sum(block.refused[k].values()), *estimates, _number(block.noise_sigma[k]), residual_sd)
        return (template % values).encode()
