"""One decoded tag message, as the tag decoders give it and the ingest process hands it over."""

from __future__ import annotations

from typing import NamedTuple

__all__ = ["TagReading"]


class TagReading(NamedTuple):
    """One decoded tag message: ``value`` (finite), ``t`` (epoch seconds, finite), ``good`` quality.

    A named tuple: the ingest process hands one over for each tag message, and a tuple crosses the
    process boundary several times cheaper than a dataclass (measured: unpickling a slotted dataclass
    was half the reader thread's time).
    """

    value: float
    t: float
    good: bool
