"""CSV reading: parsed rows, bad rows with line numbers and reason codes."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.csvdata import BadRow, CsvError, CsvRow, CsvSource, parse_time


def _rows(tmp_path: Path, text: str, inputs: tuple[str, ...] = ("u",), need_channel: bool = False) -> list:
    path = tmp_path / "d.csv"
    path.write_text(text)
    return list(CsvSource(path, inputs, need_channel))


def test_rows_parse_with_optional_columns(tmp_path: Path) -> None:
    rows = _rows(tmp_path, "t,y,u,sigma\n1.5,2.0,3.0,0.1\n2.5,4.0,5.0,\n")
    assert rows == [CsvRow(2, None, 1.5, 2.0, {"u": 3.0}, 0.1, None),
                    CsvRow(3, None, 2.5, 4.0, {"u": 5.0}, None, None)]


def test_bad_rows_carry_line_numbers_and_reasons(tmp_path: Path) -> None:
    text = "t,y,u\n1,2,3\n2,abc,3\n3,,3\n4,1\nxx,1,2\n5,1,\n"
    rows = _rows(tmp_path, text)
    bad = [(r.line, r.reason) for r in rows if isinstance(r, BadRow)]
    assert bad == [(3, "bad_number"), (4, "missing_value"), (5, "bad_row"), (6, "bad_time")]
    # An empty input cell is not a bad row: the channel rejects it as missing_input.
    assert rows[-1] == CsvRow(7, None, 5.0, 1.0, {}, None, None)


def test_nan_and_inf_parse_so_the_channel_can_reject_them(tmp_path: Path) -> None:
    rows = _rows(tmp_path, "y,u\nnan,1\n1,inf\n")
    assert [type(r) for r in rows] == [CsvRow, CsvRow]


def test_missing_columns_fail_the_file_at_once(tmp_path: Path) -> None:
    with pytest.raises(CsvError, match="lacks column\\(s\\): u"):
        _rows(tmp_path, "t,y\n1,2\n")
    with pytest.raises(CsvError, match="channel"):
        _rows(tmp_path, "y,u\n1,2\n", need_channel=True)
    with pytest.raises(CsvError, match="empty file"):
        _rows(tmp_path, "")


def test_invalid_utf8_becomes_a_bad_number_not_a_crash(tmp_path: Path) -> None:
    path = tmp_path / "d.csv"
    path.write_bytes(b"y,u\n1,\xff\xfe\n2,3\n")
    rows = list(CsvSource(path, ("u",), False))
    assert isinstance(rows[0], BadRow) and rows[0].reason == "bad_number"
    assert isinstance(rows[1], CsvRow)


def test_iso_8601_and_epoch_times() -> None:
    # 2026-01-01T00:00:00Z is 1767225600 s after the epoch (computed: 56 years incl. 14 leap days).
    assert parse_time("2026-01-01T00:00:00Z") == 1767225600.0
    assert parse_time("2026-01-01T00:00:00") == 1767225600.0      # naive means UTC
    assert parse_time("2026-01-01T01:00:00+01:00") == 1767225600.0
    assert parse_time(" 1767225600.25 ") == 1767225600.25
    with pytest.raises(ValueError):
        parse_time("yesterday")
