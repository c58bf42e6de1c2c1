"""The long CSV layout (time, tag, value, optional quality): rows, bad rows with their lines, the quality rule."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pytest

from service.offline.csv_source import BadRow, CsvError
from service.offline.long_csv import REASONS, LongCsvSource, TagRow, is_long_header, quality_is_good


def _rows(tmp_path: Path, text: str, encoding: str = "utf-8") -> list[TagRow | BadRow]:
    path = tmp_path / "long.csv"
    path.write_bytes(text.encode(encoding))
    return list(LongCsvSource(path))


def test_the_long_layout_is_told_by_time_tag_and_value_without_y() -> None:
    assert is_long_header(["time", "tag", "value"])
    assert is_long_header(["quality", "value", "tag", "time", "unit"])
    assert not is_long_header(["t", "tag", "value"])                # wide names: t, not time
    assert not is_long_header(["time", "tag", "value", "y"])        # a y column is the wide layout's
    assert not is_long_header(["time", "y", "tag"])


def test_rows_read_epoch_seconds_and_iso_times_with_and_without_quality(tmp_path: Path) -> None:
    rows = _rows(tmp_path, "time,tag,value,quality,unit\n"
                           "1767225600.25,a,1.5,good,m\n"
                           "2026-01-01T00:00:01Z,b,-2e-3,,m\n"
                           "2026-01-01T01:00:01,c, 7 , 192 ,m\n"
                           "2026-01-01T02:00:00.5+01:00,a,0,0,m\n")
    iso = datetime(2026, 1, 1, tzinfo=UTC).timestamp()
    assert rows == [TagRow(2, "a", 1767225600.25, 1.5, "good"),
                    TagRow(3, "b", iso + 1.0, -2e-3, ""),
                    TagRow(4, "c", iso + 3601.0, 7.0, " 192 "),           # naive ISO means UTC
                    TagRow(5, "a", iso + 3600.5, 0.0, "0")]
    assert _rows(tmp_path, "tag,value,time\nx,1,1767225600\n") == [TagRow(2, "x", 1767225600.0, 1.0, None)]


def test_a_byte_order_mark_and_blank_rows_are_skipped(tmp_path: Path) -> None:
    rows = _rows(tmp_path, "time,tag,value\r\n\r\n1767225600,a,1\r\n\r\n1767225601,a,2\r\n", encoding="utf-8-sig")
    assert rows == [TagRow(3, "a", 1767225600.0, 1.0, None), TagRow(5, "a", 1767225601.0, 2.0, None)]


def test_every_bad_row_is_reported_with_its_line_and_the_first_reason(tmp_path: Path) -> None:
    rows = _rows(tmp_path, "time,tag,value,quality\n"
                           "1767225600,a,1,good\n"            # 2 good
                           "1767225600,a,1\n"                 # 3 three fields of four
                           ",,1,good\n"                       # 4 no tag (checked first)
                           "1767225600,a,,good\n"             # 5 no value
                           "1767225600,a,1_000,good\n"        # 6 digit separators are not plain decimals
                           "1767225600,a,twelve,good\n"       # 7
                           "1767225600,a,nan,bad\n"           # 8 a tag message's value is finite, bad or not
                           "1767225600,a,-inf,good\n"         # 9
                           ",a,1,good\n"                      # 10 no time
                           "yesterday,a,1,good\n"             # 11
                           "inf,a,1,good\n"                   # 12 a time must be finite
                           "2026-13-01T00:00:00,a,1,good\n"   # 13
                           "1767225601,a,2,good\n")           # 14 good
    reasons = [(r.line, r.reason) if isinstance(r, BadRow) else (r.line, "ok") for r in rows]
    assert reasons == [(2, "ok"), (3, "bad_row"), (4, "missing_tag"), (5, "missing_value"), (6, "bad_number"),
                       (7, "bad_number"), (8, "non_finite"), (9, "non_finite"), (10, "missing_time"),
                       (11, "bad_time"), (12, "bad_time"), (13, "bad_time"), (14, "ok")]
    assert {r.reason for r in rows if isinstance(r, BadRow)} <= REASONS
    assert all(len(r.detail) <= 200 for r in rows if isinstance(r, BadRow))


def test_a_header_without_time_tag_or_value_cannot_be_used(tmp_path: Path) -> None:
    with pytest.raises(CsvError, match=r"lacks column.*value"):
        _rows(tmp_path, "time,tag,val\n1,a,1\n")
    with pytest.raises(CsvError, match="empty file"):
        _rows(tmp_path, "")


@pytest.mark.parametrize(("cell", "good", "expected"), [
    # No quality rule (the tag's format has none): every value is good, whatever the cell says.
    ("bad", None, True),
    # No column, or an empty cell: good.
    (None, ("good",), True),
    ("  ", ("good",), True),
    # Text equals a string good value, exactly (white space around the cell ignored).
    ("good", ("good", 192), True),
    (" good ", ("good",), True),
    ("Good", ("good",), False),
    ("bad", ("good", 192), False),
    # A plain decimal equal to an integer good value; the same text also matches a string "192".
    ("192", ("good", 192), True),
    ("192.0", (192,), True),
    ("1.92e2", (192,), True),
    ("192.5", (192,), False),
    ("0x c0", (192,), False),
    ("nan", (192,), False),
    ("192", ("192",), True),
    # Booleans as JSON writes them, in any case; not as numbers.
    ("true", (True,), True),
    ("TRUE", (True,), True),
    ("false", (True,), False),
    ("1", (True,), False),
    ("false", (False,), True),
])
def test_a_quality_cell_is_good_by_the_formats_good_values(cell: str | None, good: tuple[str | int | bool, ...] | None,
                                                          expected: bool) -> None:
    assert quality_is_good(cell, good) is expected
