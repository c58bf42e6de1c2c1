"""CSV reading: parsed rows, bad rows with line numbers and reason codes."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.broker_link.text_values import parse_time
from service.config.settings import parse_config
from service.offline.csv_source import REASONS, BadRow, CsvError, CsvRow, CsvSource
from service.offline.replay import replay_file


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


# ------------------------------------------------------------- hostile files
HEADER = b"t,y,u,sigma,channel\n"
_CONFIG = parse_config({"channels": {"a": {"terms": ["1", "u"]}, "b": {"terms": ["1", "u"], "weighting": "sample"}}})
_FUZZ = settings(max_examples=150, deadline=None, derandomize=True, database=None,
                 suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
_CELLS = st.sampled_from(["", "1", "-2.5e3", "nan", "NaN", "-inf", "Infinity", "1e400", "1e-400", "1_0", "\u0661",
                          "0x10", "\x00", '"', '""', "\r", "\n", ",", "a", "b", "\ufeff", "2026-01-01T00:00:00Z",
                          "9999-12-31T23:59:59-23:59", "\udcff", "1" * 400])


def _read_all(path: Path, header_written: bool) -> list[CsvRow | BadRow]:
    """Every row of the file. CsvError is the one exception a file may raise as a whole, and only when
    it lacks our header (the header names every column the reader needs, so with it nothing is refused)."""
    try:
        return list(CsvSource(path, ("u",), True))
    except CsvError:
        if header_written:
            raise
        return []


def _check_rows(rows: list[CsvRow | BadRow]) -> None:
    for row in rows:
        assert isinstance(row, CsvRow | BadRow)
        if isinstance(row, BadRow):
            assert row.reason in REASONS and len(row.detail) <= 200
        assert row.line >= 2


@given(data=st.binary(max_size=400), header=st.booleans())
@_FUZZ
def test_fuzz_random_bytes_never_raise_and_every_bad_row_has_a_reason(tmp_path: Path, data: bytes,
                                                                      header: bool) -> None:
    path = tmp_path / "fuzz.csv"
    path.write_bytes((HEADER if header else b"") + data)
    _check_rows(_read_all(path, header))
    try:
        result = replay_file(path, _CONFIG, show_progress=False)
    except CsvError:
        return
    assert result.rows >= result.bad_rows


@given(rows=st.lists(st.lists(_CELLS, min_size=1, max_size=7), max_size=12))
@_FUZZ
def test_fuzz_csv_shaped_text_never_raises(tmp_path: Path, rows: list[list[str]]) -> None:
    path = tmp_path / "fuzz.csv"
    text = "\n".join(",".join(cells) for cells in rows)
    path.write_bytes(HEADER + text.encode("utf-8", "surrogatepass"))
    _check_rows(_read_all(path, True))
    result = replay_file(path, _CONFIG, show_progress=False)
    assert sum(r["samples"] + r["warmup"] for r in result.channels.values()) <= result.rows - result.bad_rows


# Rows built to be valid (their values known) or to carry one defect (its reason known), and blank lines.
_FINITE = st.floats(allow_nan=False, allow_infinity=False)          # repr() gives back the same float64
_PAD = st.sampled_from(["", " ", "  "])                              # cells are read stripped
_NOT_NUMBERS = st.sampled_from(["abc", "1_000", "\u0661", "0x10", "1.5.2", "--1", "1e", "\ufffd"])
_NOT_TIMES = st.sampled_from(["yesterday", "2026-13-01T00:00:00Z", "12:00", "T", "0x10"])
_DEFECTS = ("extra_field", "missing_field", "y_empty", "y_not_number", "u_not_number", "sigma_not_number",
            "t_not_time")


@st.composite
def _valid_row(draw: st.DrawFn) -> tuple[list[str], dict[str, object]]:
    """Cells ``t, y, u, sigma, channel`` and the CsvRow fields they must read back as (line aside)."""
    t = draw(st.none() | _FINITE)
    y = draw(_FINITE)
    u = draw(st.none() | _FINITE)
    sigma = draw(st.none() | st.floats(min_value=1e-9, max_value=1e9))
    channel = draw(st.sampled_from(["a", "b", "pump-3", "Zone_7"]))

    def text(value: float | None) -> str:
        return "" if value is None else draw(_PAD) + repr(value) + draw(_PAD)

    cells = [text(t), text(y), text(u), text(sigma), draw(_PAD) + channel + draw(_PAD)]
    fields = {"channel": channel, "t": t, "y": y, "inputs": {} if u is None else {"u": u}, "sigma": sigma,
              "weight": None}
    return cells, fields


@st.composite
def _line(draw: st.DrawFn) -> tuple[str, object]:
    """One line of the file and what the reader must make of it: CsvRow fields, a reason, or None (skipped)."""
    kind = draw(st.sampled_from(["valid", "valid", "defect", "blank"]))
    if kind == "blank":
        return draw(st.sampled_from(["", "   "])), None
    cells, fields = draw(_valid_row())
    if kind == "valid":
        return ",".join(cells), fields
    defect = draw(st.sampled_from(_DEFECTS))
    if defect == "extra_field":
        cells, reason = [*cells, "x"], "bad_row"
    elif defect == "missing_field":
        cells, reason = cells[:-1], "bad_row"
    elif defect == "y_empty":
        cells[1], reason = draw(_PAD), "missing_value"
    elif defect == "t_not_time":
        cells[0], reason = draw(_NOT_TIMES), "bad_time"
    else:
        cells[{"y_not_number": 1, "u_not_number": 2, "sigma_not_number": 3}[defect]] = draw(_NOT_NUMBERS)
        reason = "bad_number"
    return ",".join(cells), reason


@given(lines=st.lists(_line(), max_size=25), newline=st.sampled_from(["\n", "\r\n"]))
@_FUZZ
def test_valid_rows_read_back_exactly_and_each_defect_is_refused_with_its_reason_and_line(
        tmp_path: Path, lines: list[tuple[str, object]], newline: str) -> None:
    path = tmp_path / "generated.csv"
    text = newline.join(["t,y,u,sigma,channel", *(line for line, _ in lines)]) + newline
    path.write_bytes(text.encode("utf-8"))
    got = list(CsvSource(path, ("u",), True))
    # The header is line 1; a blank line is skipped but still counts.
    expected = [(number, outcome) for number, (_, outcome) in enumerate(lines, start=2) if outcome is not None]
    assert len(got) == len(expected), (got, expected)
    for row, (number, outcome) in zip(got, expected, strict=True):
        if isinstance(outcome, dict):
            assert row == CsvRow(line=number, **outcome)                       # type: ignore[arg-type]
        else:
            assert isinstance(row, BadRow), (number, row)
            assert (row.line, row.reason) == (number, outcome), row
            assert 0 < len(row.detail) <= 200


@pytest.mark.parametrize(("cell", "outcome"), [
    ("nan", "non_finite"), ("NaN", "non_finite"), ("-nan", "non_finite"), ("+NAN", "non_finite"),
    ("inf", "non_finite"), ("-Infinity", "non_finite"), ("INF", "non_finite"), ("1e400", "non_finite"),
    ("-1e400", "non_finite"), ("1e-400", "applied"), ("1_000", "bad_number"), ("\u0661\u0662", "bad_number"),
    ("0x10", "bad_number"), ("1.5.2", "bad_number"), ("\ufffd", "bad_number"), ("1" * 5000, "non_finite"),
])
def test_every_spelling_of_a_number_is_read_or_refused_with_a_reason(tmp_path: Path, cell: str,
                                                                      outcome: str) -> None:
    path = tmp_path / "numbers.csv"
    rows = "".join(f"{k},{1.0 + k},{0.1 * k}\n" for k in range(1, 4))       # three good rows first
    path.write_text(f"t,y,u\n{rows}4,{cell},1\n5,2,{cell}\n", encoding="utf-8")
    config = parse_config({"channels": {"a": {"terms": ["1", "u"]}}})
    result = replay_file(path, config, show_progress=False)
    noted = [n["reason"] for n in result.listed_problems]
    if outcome == "applied":
        assert noted == [] and result.channels["a"]["samples"] + result.channels["a"]["warmup"] == 5
    else:
        assert noted == [outcome, outcome]


def test_a_utf8_byte_order_mark_is_skipped(tmp_path: Path) -> None:
    path = tmp_path / "bom.csv"
    path.write_bytes(b"\xef\xbb\xbfy,u\n1,2\n")
    assert list(CsvSource(path, ("u",), False)) == [CsvRow(2, None, None, 1.0, {"u": 2.0}, None, None)]


def test_ten_megabyte_field_is_one_bad_row_and_the_rows_after_it_are_read(tmp_path: Path) -> None:
    path = tmp_path / "huge.csv"
    with path.open("wb") as handle:
        handle.write(b"y,u\n1,2\n1," + b"7" * (10 * 1024 * 1024) + b"\n3,4\n")
    rows = list(CsvSource(path, ("u",), False))
    assert [type(r).__name__ for r in rows] == ["CsvRow", "BadRow", "CsvRow"]
    assert rows[1].reason == "bad_row" and "field limit" in rows[1].detail     # type: ignore[union-attr]


@pytest.mark.slow
def test_ten_megabytes_of_mixed_rows_replay_with_every_bad_row_counted(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    path = tmp_path / "mixed.csv"
    good = bad = 0
    with path.open("wb") as handle:
        handle.write(b"t,y,u,note\n")
        k = 0
        while handle.tell() < 10 * 1024 * 1024:
            k += 1
            if k % 4 == 0:
                garbage = bytes(rng.integers(32, 256, size=60, dtype=np.uint8)).replace(b"\"", b" ")
                handle.write(garbage + b"\n")         # no quote: a quoted field would run on over lines
                bad += 1
            else:
                u = float(rng.normal())
                handle.write(f"{k},{1.0 + 0.5 * u!r},{u!r},padding-to-make-the-file-larger-{k}\n".encode())
                good += 1
    config = parse_config({"channels": {"a": {"terms": ["1", "u"]}}})
    result = replay_file(path, config, show_progress=False)
    assert result.rows == good + bad
    channel = result.channels["a"]
    assert channel["samples"] + channel["warmup"] == good      # every good row applied, whatever came between
    assert channel["parameters"]["u"] == pytest.approx(0.5, abs=1e-9)
