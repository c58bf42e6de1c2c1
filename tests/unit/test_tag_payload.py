"""Tag messages: JSON Pointer (RFC 6901), the number and json formats, every refusal reason, quality mapping."""

from __future__ import annotations

import json
import math
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.broker_link.payload import Refusal
from service.config.tag_settings import TagFormatConfig
from service.tags.json_pointer import MISSING, JsonPointer
from service.tags.tag_payload import (
    PAYLOAD_REASONS,
    JsonTagDecoder,
    NumberTagDecoder,
    TagReading,
    make_decoder,
)

FUZZ = settings(max_examples=300, deadline=None, derandomize=True, database=None)

# 2026-01-01T00:00:00Z is 1767225600 s after the epoch (the instant test_payload.py and test_csvdata.py use).
NEW_YEAR = 1767225600.0
ARRIVAL = NEW_YEAR + 3600.0

def _reason(result: TagReading | Refusal) -> str:
    assert isinstance(result, Refusal), result
    assert result.index is None
    assert len(result.detail) <= 120
    return result.reason


def _json(**fields: Any) -> JsonTagDecoder:
    return JsonTagDecoder(TagFormatConfig.model_validate({"kind": "json", **fields}))


def _bytes(document: Any) -> bytes:
    return json.dumps(document).encode()


# --- JSON Pointer ----------------------------------------------------------------------------------------------

# RFC 6901, section 5: the example document and what each pointer in the RFC's table evaluates to.
RFC6901_DOCUMENT = {"foo": ["bar", "baz"], "": 0, "a/b": 1, "c%d": 2, "e^f": 3, "g|h": 4, "i\\j": 5,
                    'k"l': 6, " ": 7, "m~n": 8}
RFC6901_TABLE = [("", RFC6901_DOCUMENT), ("/foo", ["bar", "baz"]), ("/foo/0", "bar"), ("/", 0), ("/a~1b", 1),
                 ("/c%d", 2), ("/e^f", 3), ("/g|h", 4), ("/i\\j", 5), ('/k"l', 6), ("/ ", 7), ("/m~0n", 8)]


@pytest.mark.parametrize(("pointer", "expected"), RFC6901_TABLE)
def test_pointer_gives_rfc6901_examples(pointer: str, expected: object) -> None:
    assert JsonPointer(pointer).resolve(RFC6901_DOCUMENT) == expected


def test_pointer_unescapes_tilde_one_before_tilde_zero() -> None:
    # RFC 6901 section 4: "~01" is "~1" (a literal tilde then '1'), not "/".
    assert JsonPointer("/~01").tokens == ("~1",)
    assert JsonPointer("/~01").resolve({"~1": "tilde-one", "/": "slash"}) == "tilde-one"


@pytest.mark.parametrize("pointer", ["/foo/2", "/foo/-", "/foo/01", "/foo/x", "/foo/0/deeper", "/nothing",
                                     "/foo/-1", "/foo/\u0661"])
def test_pointer_to_nothing_is_missing(pointer: str) -> None:
    assert JsonPointer(pointer).resolve(RFC6901_DOCUMENT) is MISSING


def test_pointer_to_null_is_none_not_missing() -> None:
    assert JsonPointer("/v").resolve({"v": None}) is None


@pytest.mark.parametrize("pointer", ["foo", "/a~2", "/a~", "~0"])
def test_malformed_pointers_are_refused(pointer: str) -> None:
    with pytest.raises(ValueError, match="JSON Pointer"):
        JsonPointer(pointer)


# --- number ----------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("payload", "value"), [(b"12.5", 12.5), (b" -3e-2\r\n", -0.03), (b"7", 7.0), (b"-0", -0.0)])
def test_number_is_stamped_on_arrival_and_good(payload: bytes, value: float) -> None:
    assert NumberTagDecoder().decode(payload, ARRIVAL) == TagReading(value, ARRIVAL, True)


@pytest.mark.parametrize(("payload", "reason"), [
    (b"", "not_a_number"), (b"   ", "not_a_number"), (b"abc", "not_a_number"), (b"1_000", "not_a_number"),
    (b"0x10", "not_a_number"), (b"1,5", "not_a_number"), ("\u0661".encode(), "not_a_number"),
    (b"\xff", "not_a_number"), (b'{"v": 1}', "not_a_number"),
    (b"nan", "non_finite"), (b"inf", "non_finite"), (b"-Infinity", "non_finite"), (b"1e400", "non_finite"),
])
def test_number_refusals(payload: bytes, reason: str) -> None:
    assert _reason(NumberTagDecoder().decode(payload, ARRIVAL)) == reason


def test_number_too_large_is_refused_before_parsing() -> None:
    decoder = NumberTagDecoder(max_bytes=4)
    assert decoder.decode(b"1234", ARRIVAL) == TagReading(1234.0, ARRIVAL, True)
    assert _reason(decoder.decode(b"12345", ARRIVAL)) == "too_large"


def test_arrival_must_be_finite() -> None:
    with pytest.raises(ValueError, match="arrival"):
        NumberTagDecoder().decode(b"1", math.nan)
    with pytest.raises(ValueError, match="arrival"):
        _json(value="").decode(b"1", math.inf)


# --- json: value -----------------------------------------------------------------------------------------------


def test_json_value_at_pointer_stamped_on_arrival_without_time_pointer() -> None:
    assert _json(value="/data/0/v").decode(_bytes({"data": [{"v": 4}]}), ARRIVAL) == TagReading(4.0, ARRIVAL, True)


def test_json_whole_document_as_value() -> None:
    assert _json(value="").decode(b"2.5", ARRIVAL) == TagReading(2.5, ARRIVAL, True)


def test_json_value_may_be_a_quoted_number() -> None:
    assert _json(value="/v").decode(b'{"v": " 2.5 "}', ARRIVAL) == TagReading(2.5, ARRIVAL, True)


def test_json_value_reads_escaped_keys() -> None:
    decoder = _json(value="/a~1b/m~0n")
    assert decoder.decode(_bytes({"a/b": {"m~n": 9}}), ARRIVAL) == TagReading(9.0, ARRIVAL, True)


@pytest.mark.parametrize(("payload", "reason"), [
    (b"", "bad_json"), (b"{", "bad_json"), (b'{"v": NaN}', "bad_json"), (b'{"v": Infinity}', "bad_json"),
    (b'{"v": "\xff"}', "bad_json"), (b"[" * 5000 + b"]" * 5000, "bad_json"), (b'{"v": 1} x', "bad_json"),
    (b"{}", "missing_value"), (b'{"v": null}', "missing_value"), (b"[1]", "missing_value"),
    (b'{"v": true}', "not_a_number"), (b'{"v": {"x": 1}}', "not_a_number"), (b'{"v": [1]}', "not_a_number"),
    (b'{"v": "twelve"}', "not_a_number"), (b'{"v": "1_0"}', "not_a_number"),
    (b'{"v": 1e400}', "non_finite"), (b'{"v": -1e400}', "non_finite"), (b'{"v": "nan"}', "non_finite"),
    (b'{"v": ' + b"9" * 400 + b"}", "non_finite"),          # an integer beyond float range
    (b'{"v": 1, "w": ' + b"9" * 5000 + b"}", "non_finite"),  # an integer literal too long for the parser
])
def test_json_value_refusals(payload: bytes, reason: str) -> None:
    assert _reason(_json(value="/v").decode(payload, ARRIVAL)) == reason


def test_json_out_of_range_number_elsewhere_does_not_refuse() -> None:
    # The parser refuses 1e400 anywhere in a document; the decoder reads it again as inf and judges only its fields.
    assert _json(value="/v").decode(b'{"v": 1.5, "debug": 1e400}', ARRIVAL) == TagReading(1.5, ARRIVAL, True)


def test_json_too_large() -> None:
    decoder = JsonTagDecoder(TagFormatConfig(kind="json", value="/v"), max_bytes=9)
    assert decoder.decode(b'{"v": 12}', ARRIVAL) == TagReading(12.0, ARRIVAL, True)
    assert _reason(decoder.decode(b'{"v": 123}', ARRIVAL)) == "too_large"


def test_duplicate_keys_take_the_last() -> None:
    assert _json(value="/v").decode(b'{"v": 1, "v": 2}', ARRIVAL) == TagReading(2.0, ARRIVAL, True)


# --- json: time ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("unit", "raw", "seconds"), [
    ("s", NEW_YEAR + 0.25, NEW_YEAR + 0.25),
    ("s", int(NEW_YEAR), NEW_YEAR),
    ("s", "1767225600.5", NEW_YEAR + 0.5),
    ("ms", 1767225600123, 1767225600123 / 1000.0),
    ("ms", "1767225600500", NEW_YEAR + 0.5),
    ("iso8601", "2026-01-01T00:00:00Z", NEW_YEAR),
    ("iso8601", "2026-01-01T01:00:00.5+01:00", NEW_YEAR + 0.5),
    ("iso8601", "2026-01-01T00:00:01", NEW_YEAR + 1.0),         # naive means UTC
])
def test_json_time_units(unit: str, raw: object, seconds: float) -> None:
    decoder = _json(value="/v", time="/ts", time_unit=unit)
    assert decoder.decode(_bytes({"v": 1, "ts": raw}), ARRIVAL) == TagReading(1.0, seconds, True)


@pytest.mark.parametrize(("unit", "raw", "reason"), [
    ("s", None, "missing_time"), ("ms", None, "missing_time"), ("iso8601", None, "missing_time"),
    ("s", True, "bad_time"), ("s", "soon", "bad_time"), ("s", [1], "bad_time"), ("ms", "1e400", "bad_time"),
    ("iso8601", NEW_YEAR, "bad_time"), ("iso8601", "2026-13-01T00:00:00Z", "bad_time"),
    ("iso8601", "yesterday", "bad_time"), ("iso8601", "1767225600", "bad_time"),
])
def test_json_time_refusals(unit: str, raw: object, reason: str) -> None:
    decoder = _json(value="/v", time="/ts", time_unit=unit)
    assert _reason(decoder.decode(_bytes({"v": 1, "ts": raw}), ARRIVAL)) == reason


def test_json_time_absent_and_out_of_range() -> None:
    decoder = _json(value="/v", time="/ts")
    assert _reason(decoder.decode(b'{"v": 1}', ARRIVAL)) == "missing_time"
    assert _reason(decoder.decode(b'{"v": 1, "ts": 1e400}', ARRIVAL)) == "bad_time"


# --- json: quality ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("quality", "good"), [
    ("good", True), ("Good", False), ("bad", False),
    (192, True), (192.0, True), ("192", False),
    (True, True), (1, False), (False, False), (0, False),
])
def test_quality_compares_by_json_type_and_value(quality: object, good: bool) -> None:
    decoder = _json(value="/v", quality="/q", good=["good", 192, True])
    assert decoder.decode(_bytes({"v": 3, "q": quality}), ARRIVAL) == TagReading(3.0, ARRIVAL, good)


def test_quality_one_matches_number_one_not_true() -> None:
    decoder = _json(value="/v", quality="/q", good=[1])
    assert decoder.decode(b'{"v": 3, "q": 1}', ARRIVAL) == TagReading(3.0, ARRIVAL, True)
    assert decoder.decode(b'{"v": 3, "q": true}', ARRIVAL) == TagReading(3.0, ARRIVAL, False)


@pytest.mark.parametrize(("payload", "reason"), [
    (b'{"v": 3}', "missing_quality"), (b'{"v": 3, "q": null}', "missing_quality"),
    (b'{"v": 3, "q": {"code": 0}}', "bad_quality"), (b'{"v": 3, "q": ["good"]}', "bad_quality"),
])
def test_quality_refusals(payload: bytes, reason: str) -> None:
    assert _reason(_json(value="/v", quality="/q", good=["good"]).decode(payload, ARRIVAL)) == reason


def test_first_failed_check_gives_the_reason() -> None:
    decoder = _json(value="/v", time="/ts", quality="/q", good=["good"])
    assert _reason(decoder.decode(b'{"ts": "x", "q": {}}', ARRIVAL)) == "missing_value"
    assert _reason(decoder.decode(b'{"v": 1, "ts": "x", "q": {}}', ARRIVAL)) == "bad_time"
    assert _reason(decoder.decode(b'{"v": 1, "ts": 5, "q": {}}', ARRIVAL)) == "bad_quality"


def test_make_decoder_picks_the_kind() -> None:
    assert isinstance(make_decoder(TagFormatConfig(kind="number")), NumberTagDecoder)
    assert isinstance(make_decoder(TagFormatConfig(kind="json", value="/v")), JsonTagDecoder)
    with pytest.raises(ValueError, match="kind 'json'"):
        JsonTagDecoder(TagFormatConfig(kind="number"))


# --- any input -------------------------------------------------------------------------------------------------

_SOME_JSON = st.recursive(st.none() | st.booleans() | st.floats(allow_nan=False, allow_infinity=False)
                          | st.integers() | st.text(max_size=8),
                          lambda inner: st.lists(inner, max_size=3) | st.dictionaries(
                              st.sampled_from(["v", "ts", "q", "x"]), inner, max_size=4),
                          max_leaves=8)


@FUZZ
@given(st.one_of(st.binary(max_size=64), _SOME_JSON.map(_bytes)), st.sampled_from(["s", "ms", "iso8601"]))
def test_any_message_gives_a_finite_reading_or_a_known_reason(payload: bytes, unit: str) -> None:
    decoders = [NumberTagDecoder(max_bytes=48),
                _json(value="/v", time="/ts", time_unit=unit, quality="/q", good=["good", 0])]
    for decoder in decoders:
        result = decoder.decode(payload, ARRIVAL)
        if isinstance(result, Refusal):
            assert result.reason in PAYLOAD_REASONS
            assert result.index is None and len(result.detail) <= 120
        else:
            assert math.isfinite(result.value) and math.isfinite(result.t)
            assert type(result.value) is float and type(result.good) is bool


def test_one_example_of_every_reason() -> None:
    full = _json(value="/v", time="/ts", quality="/q", good=["good"])
    examples = {
        "too_large": (NumberTagDecoder(max_bytes=2), b"123"),
        "bad_json": (full, b"{"),
        "non_finite": (full, b'{"v": 1e400}'),
        "missing_value": (full, b"{}"),
        "not_a_number": (NumberTagDecoder(), b"x"),
        "missing_time": (full, b'{"v": 1}'),
        "bad_time": (full, b'{"v": 1, "ts": "x"}'),
        "missing_quality": (full, b'{"v": 1, "ts": 1}'),
        "bad_quality": (full, b'{"v": 1, "ts": 1, "q": []}'),
    }
    assert set(examples) == PAYLOAD_REASONS
    for reason, (decoder, payload) in examples.items():
        assert _reason(decoder.decode(payload, ARRIVAL)) == reason
