"""What readers see: an immutable snapshot of every channel, with its quality and its /snapshot fragment.

The engine replaces the snapshot after a micro-batch; API handlers read the
latest one without locks. Each channel carries its member of the flat
``GET /api/v1/snapshot`` document ready-made (``fragment``), so that document
is a join of bytes, whatever the channel count.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import dataclass

from estimator import CONDITION_LIMIT, ChannelView
from service.alarms.lifecycle import Alarm
from service.engine.quality import Quality, QualityReason, estimates_shown

__all__ = ["CONDITION_LIMIT", "REFUSED_IN_A_ROW", "ChannelEntry", "FragmentWriter", "Snapshot", "channel_quality"]


@dataclass(frozen=True)
class ChannelEntry:
    """What readers see of one channel."""

    view: ChannelView
    quality: Quality
    quality_reason: QualityReason
    updated_at: float | None     # wall-clock time of the last applied sample
    fragment: bytes              # its member of the flat /snapshot document


@dataclass(frozen=True)
class Snapshot:
    """An immutable picture of every channel, replaced after each batch."""

    version: int
    created_at: float
    channels: Mapping[str, ChannelEntry]
    alarms: tuple[Alarm, ...] = ()        # copies of every alarm, when the engine keeps an alarm book


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

    The names never change, so each channel's template holds them already
    quoted and only the numbers are formatted per call: this runs for every
    touched channel on every snapshot.
    """

    def __init__(self) -> None:
        self._templates: dict[str, str] = {}

    def _template(self, view: ChannelView) -> str:
        names = [json.dumps(term).replace("%", "%%") for term in view.terms]
        members = ", ".join(f"{name}: %s" for name in names)
        return (f'{json.dumps(view.channel).replace("%", "%%")}:{{"quality": "%s", "quality_reason": "%s", '
                f'"updated_at": %s, "t": %s, "samples": %d, "rejected": %d, '
                f'"parameters": {{{members}}}, "std_errors": {{{members}}}, '
                f'"noise_sigma": %s, "residual_sd": %s}}')

    def write(self, view: ChannelView, quality: Quality, reason: QualityReason, updated_at: float | None) -> bytes:
        template = self._templates.get(view.channel)
        if template is None:
            template = self._templates[view.channel] = self._template(view)
        n = len(view.terms)
        if estimates_shown(quality):
            estimates = [_number(v) for v in view.parameters.tolist() + view.std_errors.tolist()]
            residual_sd = _number(view.residual_sd)
        else:
            estimates = ["null"] * (2 * n)
            residual_sd = "null"
        values = (quality, reason, _number(updated_at), _number(view.last_t), view.applied,
                  sum(view.refused.values()), *estimates, _number(view.noise_sigma), residual_sd)
        return (template % values).encode()
