"""Reading sample histories from CSV, row by row, with line numbers for every bad row.

Layout: a header row, then one sample per row. Columns: ``y`` (required), one
column per input name, optional ``t`` (epoch seconds or ISO 8601; naive times
are UTC), optional ``sigma`` or ``weight``, optional ``channel`` (required when
the configuration has several channels). Other columns are ignored.

Numbers are plain ASCII decimals as ``float`` reads them (``1.5``, ``-2e-3``,
``nan``, ``inf``); digit separators (``1_000``) and non-ASCII digits, which
``float`` would also take, are refused as ``bad_number``. Non-finite values
parse, so the channel can refuse them with its own reason. A UTF-8 byte order
mark is skipped; undecodable bytes become U+FFFD and so a bad number; a field
longer than :data:`MAX_FIELD_CHARS` makes its row a ``bad_row``.

:class:`CsvFile` is the frame both layouts share (this one, and the long one of
:mod:`service.offline.long_csv`): the header, then each row's fields with its line
number, unreadable rows and rows of the wrong width as ``bad_row``.
"""

from __future__ import annotations

import csv
from collections.abc import Callable, Generator, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import cast

from service.broker_link.text_values import parse_number, parse_time

__all__ = ["BadRow", "CsvError", "CsvFile", "CsvRow", "CsvSource"]

RESERVED = ("t", "y", "sigma", "weight", "channel")
REASONS = frozenset({"bad_row", "bad_number", "missing_value", "bad_time"})
MAX_FIELD_CHARS = 1 << 20                # the csv module's limit, raised from its default 131,072


class CsvError(Exception):
    """The file as a whole cannot be used (unreadable, no header, columns missing)."""


@dataclass(frozen=True)
class CsvRow:
    """One parsed sample. ``inputs`` omits inputs whose cell was empty."""

    line: int
    channel: str | None
    t: float | None
    y: float
    inputs: dict[str, float]
    sigma: float | None
    weight: float | None


@dataclass(frozen=True)
class BadRow:
    """A row that could not be read; ``reason`` is a stable code."""

    line: int
    reason: str
    detail: str


class _CountingLines:
    """Iterates a text file's lines and counts the characters read (for progress)."""

    def __init__(self, lines: Iterable[str]) -> None:
        self._lines = iter(lines)
        self.chars = 0

    def __iter__(self) -> Iterator[str]:
        return self

    def __next__(self) -> str:
        line = next(self._lines)
        self.chars += len(line)
        return line


class CsvFile:
    """A CSV file read as its header, then ``(line, fields)`` per row or a :class:`BadRow`.

    Blank rows are skipped; a row with another number of fields than the header, or one the csv
    module cannot read (a field beyond :data:`MAX_FIELD_CHARS`), is a ``bad_row``. UTF-8, a byte
    order mark skipped, undecodable bytes as U+FFFD.

    Raises
    ------
    CsvError
        The file cannot be read (at construction), or has no readable header row (when read).
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        try:
            self.total_chars = max(self.path.stat().st_size, 1)
        except OSError as exc:
            raise CsvError(f"{path}: cannot read: {exc.strerror}") from None
        self.progress_chars = 0

    def header(self) -> list[str]:
        """The header's column names, stripped (the file is read to the end of its first row only)."""
        header, rows = self.read()
        rows.close()
        return header

    def read(self) -> tuple[list[str], Generator[tuple[int, list[str]] | BadRow, None, None]]:
        """The header's column names (stripped), and each row after it as ``(line, fields)`` or a :class:`BadRow`.

        The file stays open until the rows are exhausted or closed.
        """
        items = self._read()
        header = next(items)
        if not isinstance(header, list):          # the generator's first item is the header
            raise TypeError("expected the header first")
        return header, cast(Generator[tuple[int, list[str]] | BadRow, None, None], items)

    def _read(self) -> Generator[list[str] | tuple[int, list[str]] | BadRow, None, None]:
        if csv.field_size_limit() < MAX_FIELD_CHARS:
            csv.field_size_limit(MAX_FIELD_CHARS)
        with self.path.open("r", encoding="utf-8-sig", errors="replace", newline="") as handle:
            counter = _CountingLines(handle)
            reader = csv.reader(counter)
            try:
                header = next(reader, None)
            except csv.Error as exc:
                raise CsvError(f"{self.path}: unreadable header row: {exc}") from None
            if header is None:
                raise CsvError(f"{self.path}: empty file, expected a header row")
            yield [name.strip() for name in header]
            width = len(header)
            while True:
                try:
                    fields = next(reader)
                except StopIteration:
                    break
                except csv.Error as exc:      # a field beyond the limit: that row only
                    self.progress_chars = counter.chars
                    yield BadRow(reader.line_num, "bad_row", str(exc)[:200])
                    continue
                self.progress_chars = counter.chars
                if not fields or (len(fields) == 1 and not fields[0].strip()):
                    continue
                if len(fields) != width:
                    yield BadRow(reader.line_num, "bad_row", f"{len(fields)} fields, header has {width}")
                    continue
                yield reader.line_num, fields
            self.progress_chars = counter.chars


class CsvSource:
    """Rows of a CSV file as :class:`CsvRow` or :class:`BadRow`.

    Parameters
    ----------
    path : path of the file
    input_names : every input some channel needs
    need_channel : the file must carry a ``channel`` column
    """

    def __init__(self, path: str | Path, input_names: Iterable[str], need_channel: bool) -> None:
        self._file = CsvFile(path)
        self.path = self._file.path
        self.total_chars = self._file.total_chars
        self._input_names = sorted(set(input_names))
        self._need_channel = need_channel

    @property
    def progress_chars(self) -> int:
        """Characters read so far (for progress)."""
        return self._file.progress_chars

    def __iter__(self) -> Iterator[CsvRow | BadRow]:
        header, rows = self._file.read()
        columns = {name: i for i, name in enumerate(header)}
        missing = [c for c in ("y", *self._input_names) if c not in columns]
        if self._need_channel and "channel" not in columns:
            missing.append("channel")
        if missing:
            rows.close()
            raise CsvError(f"{self.path}: header lacks column(s): {', '.join(missing)}")
        parse = self._parser(columns)
        for item in rows:
            yield item if isinstance(item, BadRow) else parse(item[0], item[1])

    def _parser(self, columns: dict[str, int]) -> Callable[[int, list[str]], CsvRow | BadRow]:
        """A row's parse with the column positions looked up once (a missing optional column reads as empty)."""
        y_at = columns["y"]
        inputs_at = [(name, columns[name]) for name in self._input_names]
        sigma_at, weight_at = columns.get("sigma"), columns.get("weight")
        t_at, channel_at = columns.get("t"), columns.get("channel")

        def number(fields: list[str], index: int | None) -> float | None:
            if index is None:
                return None
            text = fields[index].strip()
            return parse_number(text) if text else None

        def parse(line: int, fields: list[str]) -> CsvRow | BadRow:
            try:
                y = number(fields, y_at)
                inputs = {}
                for name, index in inputs_at:
                    value = number(fields, index)
                    if value is not None:
                        inputs[name] = value
                sigma = number(fields, sigma_at)
                weight = number(fields, weight_at)
            except ValueError as exc:
                return BadRow(line, "bad_number", str(exc)[:200])
            if y is None:
                return BadRow(line, "missing_value", "y is empty")
            t_text = fields[t_at].strip() if t_at is not None else ""
            try:
                t = parse_time(t_text) if t_text else None
            except (ValueError, OverflowError):
                return BadRow(line, "bad_time", f"cannot read time {t_text[:40]!r}")
            channel = (fields[channel_at].strip() if channel_at is not None else "") or None
            return CsvRow(line, channel, t, y, inputs, sigma, weight)

        return parse
