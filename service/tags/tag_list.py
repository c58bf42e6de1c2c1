"""Tag lists: many tags from one CSV file, every bad row reported with its line number.

Layout: a header row, then one tag entry per row (the same entry as ``[[tags.tag]]``,
:class:`~service.config.tag_settings.TagConfig`)::

    id,topic,format,unit,description,max_age
    sub7.FT-101,plant/sub7/FT-101,number,m3/h,supply flow,60
    sub7.SC-101,plant/sub7/SC-101,number,%,pump speed,
    {1}.{2},gw/+/+/value,gateway,,every tag behind the gateways,

Columns, in any order: ``id`` and ``topic`` (required; a pattern's id is its template),
``format`` (default ``number``), ``unit``, ``description``, ``max_age`` (seconds; empty or ``inf``:
unbounded). Any other column is refused, so a misspelt one does not silently drop its values. Cells
are stripped of surrounding white space; blank rows are skipped; the file is UTF-8 (a byte order
mark is skipped). Every bad row is reported as ``<file>:<line>: <key>: <problem>`` (all of them,
up to :data:`MAX_PROBLEMS`), and nothing is returned unless every row is good. Problems between
rows (a duplicate id, overlapping patterns) are the registry's to find
(:class:`~service.tags.registry.TagRegistry`), with the same line references.
"""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path

from pydantic import ValidationError

from service.broker_link.text_values import parse_number
from service.config.tag_settings import TagConfig
from service.tags.registry import ListedTag, TagConfigError

__all__ = ["COLUMNS", "MAX_PROBLEMS", "read_tag_list"]

COLUMNS: tuple[str, ...] = ("id", "topic", "format", "unit", "description", "max_age")
REQUIRED: tuple[str, ...] = ("id", "topic")
MAX_PROBLEMS = 50
"""Problems listed before the rest are only counted."""


def _max_age(text: str) -> float:
    if not text or text.lower() == "inf":
        return math.inf
    try:
        return parse_number(text)
    except ValueError:
        raise ValueError(f"max_age: must be seconds (a number), or empty for unbounded, got {text[:40]!r}") from None


def _row_problems(error: ValidationError) -> list[str]:
    problems = []
    for item in error.errors():
        key = ".".join(str(part) for part in item["loc"])
        message = item["msg"].removeprefix("Value error, ")
        problems.append(f"{key}: {message}" if key else message)
    return problems


def read_tag_list(path: str | Path) -> list[ListedTag]:
    """Every tag entry of a CSV tag list, each with its source ``<path>:<line>``.

    Raises
    ------
    TagConfigError
        The file cannot be read, its header is unusable, or rows are bad (one line per problem).
    """
    name = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise TagConfigError([f"{name}: cannot read: {exc.strerror}"]) from None
    except UnicodeDecodeError as exc:
        raise TagConfigError([f"{name}: not UTF-8 (byte {exc.start})"]) from None
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader, None)
    except csv.Error as exc:
        raise TagConfigError([f"{name}:1: unreadable header row: {exc}"]) from None
    if header is None:
        raise TagConfigError([f"{name}: empty file; expected a header row ({','.join(COLUMNS)})"])
    columns = [cell.strip() for cell in header]
    problems = []
    unknown = [c for c in columns if c not in COLUMNS]
    if unknown:
        problems.append(f"{name}:1: unknown column(s) {', '.join(map(repr, unknown))} (known: {', '.join(COLUMNS)})")
    missing = [c for c in REQUIRED if c not in columns]
    if missing:
        problems.append(f"{name}:1: header lacks column(s) {', '.join(missing)}")
    repeated = sorted({c for c in columns if columns.count(c) > 1})
    if repeated:
        problems.append(f"{name}:1: column(s) {', '.join(repeated)} more than once")
    if problems:
        raise TagConfigError(problems)

    listed: list[ListedTag] = []
    bad = 0
    while True:
        try:
            cells = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            bad += 1
            problems.append(f"{name}:{reader.line_num}: unreadable row: {exc}")
            continue
        line = reader.line_num
        if not any(cell.strip() for cell in cells):
            continue
        if len(cells) != len(columns):
            bad += 1
            problems.append(f"{name}:{line}: {len(cells)} fields, the header has {len(columns)}")
            continue
        row = {column: cell.strip() for column, cell in zip(columns, cells, strict=True)}
        fields: dict[str, object] = {k: v for k, v in row.items() if k != "max_age" and (v or k in REQUIRED)}
        try:
            fields["max_age"] = _max_age(row.get("max_age", ""))
            listed.append(ListedTag(TagConfig.model_validate(fields), f"{name}:{line}"))
        except ValidationError as exc:
            bad += 1
            problems += [f"{name}:{line}: {problem}" for problem in _row_problems(exc)]
        except ValueError as exc:
            bad += 1
            problems.append(f"{name}:{line}: {exc}")
    if problems:
        shown = problems[:MAX_PROBLEMS]
        if len(problems) > MAX_PROBLEMS:
            shown.append(f"{name}: ... and {len(problems) - MAX_PROBLEMS} more problem(s) in {bad} bad row(s)")
        raise TagConfigError(shown)
    return listed
