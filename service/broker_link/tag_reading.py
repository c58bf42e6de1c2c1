"""One decoded tag message, as the tag decoders give it and the ingest process hands it over."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["TagReading"]


@dataclass(frozen=True, slots=True)
class TagReading:
    """One decoded tag message: ``value`` (finite), ``t`` (epoch seconds, finite), ``good`` quality."""

    value: float
    t: float
    good: bool
