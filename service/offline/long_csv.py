"""Reading tag histories in the LONG layout historians export: one tag update per row.

Layout: a header row with the columns ``time``, ``tag`` and ``value`` (and no ``y``: a header with
``y`` is the wide layout of :mod:`service.offline.csv_source`), optionally ``quality``; other
columns are ignored. Rows are taken in file order, which stands for the order the updates arrived::

    time,tag,value,quality
    2026-01-01T00:00:00Z,sub7.SC-101,61.5,good
    1767225600.5,sub7.FT-101,118.25,192

``time``
    epoch seconds or ISO 8601 (naive means UTC), read as the service reads time stamps
    (:func:`service.broker_link.text_values.parse_time`); it is the update's stamp, whatever the
    tag's payload format (a ``number`` tag, stamped on arrival live, takes its stamp from here).
``tag``
    the tag id (not its topic).
``value``
    a plain decimal number (:func:`service.broker_link.text_values.parse_number`); finite.
``quality``
    see :func:`quality_is_good`.

Bad rows are reported with their line number and a reason, the first failed check in the order
tag, value, time: ``bad_row`` (unreadable, or another number of fields than the header),
``missing_tag``, ``missing_value``, ``bad_number``, ``non_finite`` (a tag message's value must be
finite, whatever its quality), ``missing_time``, ``bad_time`` (unreadable or not finite). Whether
the configuration knows the tag is the tag path's question (:mod:`service.offline.tag_feed`).
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from service.broker_link.text_values import parse_number, parse_time
from service.offline.csv_source import BadRow, CsvError, CsvFile

__all__ = ["REASONS", "LongCsvSource", "TagRow", "is_long_header", "quality_is_good"]

COLUMNS = ("time", "tag", "value")
REASONS = frozenset({"bad_row", "missing_tag", "missing_value", "bad_number", "non_finite", "missing_time",
                     "bad_time"})


def is_long_header(columns: Sequence[str]) -> bool:
    """True for the long layout: ``time``, ``tag`` and ``value`` columns, and no ``y`` (the wide layout's)."""
    names = set(columns)
    return names.issuperset(COLUMNS) and "y" not in names


def quality_is_good(cell: str | None, good: Sequence[str | int | bool] | None) -> bool:
    """Whether a quality cell counts as good, by the good values of the tag's payload format.

    A CSV cell has no JSON type, so it is compared with each good value as that value's type reads it:

    * ``good`` None (the tag's format has no quality: ``number``, or ``json`` without a quality
      pointer): every value is good, as it is live;
    * no quality column (``cell`` None) or an empty cell: good;
    * a string good value: the cell's text equals it (case and all; white space around the cell
      ignored);
    * an integer good value: the cell is a plain decimal number equal to it (``192``, ``192.0``);
    * a boolean good value: the cell is ``true`` / ``false`` in any case.

    Anything else is not good (no refusal: the sample assembly decides what bad quality means).
    So ``192`` matches the string ``"192"`` too, where a JSON message would distinguish them.
    """
    if good is None or cell is None:
        return True
    text = cell.strip()
    if not text:
        return True
    number: float | None = None
    for value in good:
        if isinstance(value, bool):
            if text.lower() == ("true" if value else "false"):
                return True
        elif isinstance(value, int):
            if number is None:
                try:
                    number = parse_number(text)
                except ValueError:
                    number = math.nan
            if number == value:
                return True
        elif text == value:
            return True
    return False


@dataclass(frozen=True, slots=True)
class TagRow:
    """One tag update: ``t`` epoch seconds and ``value`` finite; ``quality`` the cell (None: no column)."""

    line: int
    tag: str
    t: float
    value: float
    quality: str | None


class LongCsvSource:
    """Rows of a long CSV file as :class:`TagRow` or :class:`BadRow`, in file order.

    Raises
    ------
    CsvError
        The file cannot be read, has no header, or its header lacks ``time``, ``tag`` or ``value``.
    """

    def __init__(self, path: str | Path) -> None:
        self._file = CsvFile(path)
        self.path = self._file.path
        self.total_chars = self._file.total_chars

    @property
    def progress_chars(self) -> int:
        """Characters read so far (for progress)."""
        return self._file.progress_chars

    def __iter__(self) -> Iterator[TagRow | BadRow]:
        header, rows = self._file.read()
        columns = {name: i for i, name in enumerate(header)}
        missing = [c for c in COLUMNS if c not in columns]
        if missing:
            rows.close()
            raise CsvError(f"{self.path}: header lacks column(s): {', '.join(missing)} (long layout: time, tag, "
                           "value, optional quality)")
        at_time, at_tag, at_value = columns["time"], columns["tag"], columns["value"]
        at_quality = columns.get("quality")
        for item in rows:
            if isinstance(item, BadRow):
                yield item
                continue
            line, fields = item
            yield _parse(line, fields[at_tag].strip(), fields[at_value].strip(), fields[at_time].strip(),
                         None if at_quality is None else fields[at_quality])


def _parse(line: int, tag: str, value_text: str, time_text: str, quality: str | None) -> TagRow | BadRow:
    if not tag:
        return BadRow(line, "missing_tag", "tag is empty")
    if not value_text:
        return BadRow(line, "missing_value", f"tag {tag[:40]!r}: value is empty")
    try:
        value = parse_number(value_text)
    except ValueError as exc:
        return BadRow(line, "bad_number", f"tag {tag[:40]!r}: {str(exc)[:160]}")
    if not math.isfinite(value):
        return BadRow(line, "non_finite", f"tag {tag[:40]!r}: value {value_text[:40]!r} is not finite")
    if not time_text:
        return BadRow(line, "missing_time", f"tag {tag[:40]!r}: time is empty")
    try:
        t = parse_time(time_text)
    except (ValueError, OverflowError, OSError):
        return BadRow(line, "bad_time", f"cannot read time {time_text[:40]!r}")
    if not math.isfinite(t):
        return BadRow(line, "bad_time", f"time {time_text[:40]!r} is not finite")
    return TagRow(line, tag, t, value, quality)
