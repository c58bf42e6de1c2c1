"""Numbers and time stamps written as text, read the same way wherever they arrive (payloads, CSV files)."""

from __future__ import annotations

from datetime import UTC, datetime

__all__ = ["parse_number", "parse_time"]


def parse_number(text: str) -> float:
    """A plain decimal number (``float`` syntax, ASCII, no digit separators).

    Raises
    ------
    ValueError
        Anything else, with the first 40 characters of the text.
    """
    if not text.isascii() or "_" in text:
        raise ValueError(f"not a plain decimal number: {text[:40]!r}")
    return float(text)


def parse_time(text: str) -> float:
    """Epoch seconds from ``'1767225600.5'`` or ISO 8601 (``'2026-01-01T00:00:00Z'``); naive means UTC.

    Raises
    ------
    ValueError
        Neither form.
    """
    text = text.strip()
    try:
        return parse_number(text)
    except ValueError:
        pass
    stamp = datetime.fromisoformat(text)
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=UTC)
    return stamp.timestamp()
