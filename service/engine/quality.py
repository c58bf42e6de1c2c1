"""A channel's quality as readers see it: the OPC UA quality families and the reason for each verdict."""

from __future__ import annotations

from enum import StrEnum

__all__ = ["Quality", "QualityReason", "estimates_shown"]


class Quality(StrEnum):
    """The OPC UA (IEC 62541) quality families: Good, Uncertain, Bad."""

    GOOD = "Good"
    UNCERTAIN = "Uncertain"
    BAD = "Bad"


class QualityReason(StrEnum):
    """Why a channel is not Good (empty when it is)."""

    NONE = ""
    NO_DATA = "no_data"                        # Bad: nothing applied yet
    NOT_IDENTIFIABLE = "not_identifiable"      # Bad: the estimates cannot be computed
    SAMPLES_REFUSED = "samples_refused"        # its recent samples were all refused
    STALE = "stale"                            # Uncertain: no data for alarms.stale_after
    WARMING_UP = "warming_up"                  # Uncertain: too few samples for a standard error
    LOW_EXCITATION = "low_excitation"          # Uncertain: the inputs barely vary
    REPLICA_UNREACHABLE = "replica_unreachable"  # Bad: the replica owning it does not answer (fleet)


def estimates_shown(quality: Quality) -> bool:
    """Whether readers see a channel's estimates: a Bad channel's are not for use, so they read as null
    (the one rule behind ``/snapshot`` fragments and a channel's detail alike)."""
    return quality != Quality.BAD
