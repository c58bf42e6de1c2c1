"""JSON sample payloads: accepted samples, a reason code for every refusal, no exception on any input."""

from __future__ import annotations

import json
import math
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.broker_link import payload as payload_module
from service.broker_link.payload import MAX_DEPTH, REASONS, DecodedSample, Refusal, decode_payload

FUZZ = settings(max_examples=300, deadline=None, derandomize=True, database=None)

# 2026-01-01T00:00:00Z is 1767225600 s after the epoch (the same instant test_csvdata.py checks).
NEW_YEAR = 1767225600.0


def _decode(value: Any, **kwargs: Any) -> tuple[list[DecodedSample], list[Refusal]]:
    return decode_payload(json.dumps(value), **kwargs)


def _reasons(result: tuple[list[DecodedSample], list[Refusal]]) -> list[str]:
    return [r.reason for r in result[1]]


def _check_outcome(result: tuple[list[DecodedSample], list[Refusal]]) -> None:
    """Invariants of every answer: known reasons, short details, finite accepted values."""
    samples, refusals = result
    for refusal in refusals:
        assert refusal.reason in REASONS
        assert len(refusal.detail) <= 200
    if any(r.index is None for r in refusals):
        assert len(refusals) == 1
        assert not samples
    for sample in samples:
        numbers = [sample.y, *sample.inputs.values()]
        numbers += [v for v in (sample.t, sample.sigma, sample.weight) if v is not None]
        assert all(type(v) is float and math.isfinite(v) for v in numbers)
        assert all(type(name) is str for name in sample.inputs)
        assert sample.sigma is None or (sample.sigma > 0.0 and math.isfinite(1.0 / sample.sigma**2))
        assert sample.weight is None or sample.weight > 0.0
        assert sample.seq is None or (type(sample.seq) is int and 0 <= sample.seq < 2**63)


# --- accepted payloads -----------------------------------------------------------------------------------------


def test_single_sample_round_trips_every_field() -> None:
    message = {"t": NEW_YEAR + 0.5, "y": 1.5, "u": {"flow": 2.0, "temp": -3}, "sigma": 0.5, "weight": 4.0,
               "seq": 17}
    samples, refusals = _decode(message)
    assert refusals == []
    assert samples == [DecodedSample(NEW_YEAR + 0.5, 1.5, {"flow": 2.0, "temp": -3.0}, 0.5, 4.0, 17, None)]
    assert type(samples[0].inputs["temp"]) is float


def test_bytes_and_str_payloads_decode_alike() -> None:
    text = '{"y": 2, "u": {"a": 1}}'
    assert decode_payload(text) == decode_payload(text.encode()) == decode_payload(bytearray(text.encode()))


def test_only_y_is_required() -> None:
    assert _decode({"y": 0}) == ([DecodedSample(None, 0.0, {}, None, None, None, None)], [])


def test_iso_times_are_utc_when_naive_and_equal_the_epoch_number() -> None:
    for t in ("2026-01-01T00:00:00Z", "2026-01-01T00:00:00", "2026-01-01T01:00:00+01:00", NEW_YEAR,
              int(NEW_YEAR), "1767225600"):
        samples, refusals = _decode({"t": t, "y": 1})
        assert refusals == [], t
        assert samples[0].t == NEW_YEAR, t


def test_batch_decodes_in_order_with_positions() -> None:
    batch = {"samples": [{"t": NEW_YEAR + k, "y": float(k), "u": {"a": k}, "seq": k} for k in range(5)]}
    samples, refusals = _decode(batch)
    assert refusals == []
    assert [(s.index, s.y, s.seq, s.t) for s in samples] == [(k, float(k), k, NEW_YEAR + k) for k in range(5)]


def test_batch_mixing_good_and_bad_samples_keeps_order_and_indexes() -> None:
    batch = {"samples": [{"y": 1}, {"y": "x"}, {"y": 2}, {"u": {}}, {"y": 3, "sigma": 0}, {"y": 4}]}
    samples, refusals = _decode(batch)
    assert [(s.index, s.y) for s in samples] == [(0, 1.0), (2, 2.0), (5, 4.0)]
    assert [(r.index, r.reason) for r in refusals] == [(1, "bad_type"), (3, "missing_field"), (4, "bad_sigma")]


def test_null_means_the_same_as_absent() -> None:
    samples, refusals = _decode({"t": None, "y": 1, "u": {"a": 2, "b": None}, "sigma": None, "weight": None,
                                   "seq": None})
    assert refusals == []
    assert samples == [DecodedSample(None, 1.0, {"a": 2.0}, None, None, None, None)]
    assert _reasons(_decode({"y": None})) == ["missing_field"]
    assert _reasons(_decode({"y": 1, "u": {"a": None}}, input_names=["a"])) == ["missing_input"]


def test_named_inputs_are_required_and_extra_inputs_dropped() -> None:
    samples, refusals = _decode({"y": 1, "u": {"a": 1, "b": 2, "extra": 3}}, input_names=("b", "a"))
    assert refusals == []
    assert samples[0].inputs == {"b": 2.0, "a": 1.0}
    assert _decode({"y": 1, "u": {"a": 1}}, input_names=None)[0][0].inputs == {"a": 1.0}


def test_sigma_and_weight_at_the_edge_of_float_range_are_accepted() -> None:
    samples, refusals = _decode({"y": 1, "sigma": 1e-150, "weight": 5e-324})
    assert refusals == []
    assert samples[0].sigma == 1e-150 and samples[0].weight == 5e-324


def test_seq_accepts_the_full_unsigned_63_bit_range() -> None:
    assert _decode({"y": 1, "seq": 0})[0][0].seq == 0
    assert _decode({"y": 1, "seq": 2**63 - 1})[0][0].seq == 2**63 - 1


# --- one reason code each --------------------------------------------------------------------------------------

SAMPLE_REASONS = [
    ("bad_type", '{"samples": [3]}'),
    ("bad_type", '{"y": "1.5"}'),
    ("bad_type", '{"y": true}'),
    ("bad_type", '{"y": 1, "t": [1]}'),
    ("bad_type", '{"y": 1, "t": false}'),
    ("bad_type", '{"y": 1, "u": [1, 2]}'),
    ("bad_type", '{"y": 1, "u": {"a": "2"}}'),
    ("bad_type", '{"y": 1, "u": {"a": false}}'),
    ("bad_type", '{"y": 1, "sigma": "0.1"}'),
    ("bad_type", '{"y": 1, "weight": {}}'),
    ("bad_type", '{"y": 1, "seq": 1.0}'),
    ("bad_type", '{"y": 1, "seq": "1"}'),
    ("bad_type", '{"y": 1, "seq": -1}'),
    ("bad_type", '{"y": 1, "seq": 9223372036854775808}'),
    ("unknown_field", '{"y": 1, "z": 2}'),
    ("unknown_field", '{"y": 1, "U": {}}'),
    ("unknown_field", '{"samples": [{"samples": [{"y": 1}]}]}'),
    ("missing_field", '{"t": 1, "u": {"a": 1}}'),
    ("missing_field", '{"samples": [{}]}'),
    ("bad_time", '{"y": 1, "t": "yesterday"}'),
    ("bad_time", '{"y": 1, "t": "2026-13-01T00:00:00"}'),
    ("bad_time", '{"y": 1, "t": ""}'),
    ("bad_time", '{"y": 1, "t": 1e400}'),
    ("bad_time", '{"y": 1, "t": "inf"}'),
    ("bad_time", '{"y": 1, "t": "nan"}'),
    ("non_finite", '{"y": 1e400}'),
    ("non_finite", '{"y": 1, "u": {"a": -1e400}}'),
    ("non_finite", '{"y": 1, "sigma": 1e400}'),
    ("non_finite", '{"y": 1, "weight": 1e400}'),
    ("non_finite", '{"y": ' + str(10**400) + "}"),
    ("non_finite", '{"y": ' + str(-(10**320)) + "}"),
    ("bad_sigma", '{"y": 1, "sigma": 0}'),
    ("bad_sigma", '{"y": 1, "sigma": -0.5}'),
    ("bad_sigma", '{"y": 1, "sigma": 1e-200}'),
    ("bad_sigma", '{"y": 1, "sigma": 1e200}'),
    ("bad_weight", '{"y": 1, "weight": 0}'),
    ("bad_weight", '{"y": 1, "weight": -2.5}'),
]


@pytest.mark.parametrize(("reason", "text"), SAMPLE_REASONS)
def test_sample_is_refused_with_its_reason(reason: str, text: str) -> None:
    samples, refusals = decode_payload(text)
    assert samples == []
    assert [r.reason for r in refusals] == [reason]
    expected_index = 0 if text.startswith('{"samples"') else None
    assert refusals[0].index == expected_index
    _check_outcome((samples, refusals))


def test_missing_named_input_is_missing_input() -> None:
    samples, refusals = _decode({"y": 1, "u": {"a": 1}}, input_names=["a", "b"])
    assert samples == []
    assert refusals == [Refusal("missing_input", "missing input(s): ['b']", None)]
    assert _reasons(_decode({"y": 1}, input_names=["a"])) == ["missing_input"]


WHOLE_REASONS = [
    ("malformed_json", b""),
    ("malformed_json", b"{"),
    ("malformed_json", b'{"y": 1,}'),
    ("malformed_json", b"{'y': 1}"),
    ("malformed_json", b'{"y": 1} {"y": 2}'),
    ("malformed_json", b'{"y": 1, "y": 2}'),
    ("malformed_json", b'{"y": 1, "u": {"a": 1, "a": 1}}'),
    ("malformed_json", b'\xef\xbb\xbf{"y": 1}'),
    ("bad_structure", b"[]"),
    ("bad_structure", b'[{"y": 1}]'),
    ("bad_structure", b"1.5"),
    ("bad_structure", b'"y"'),
    ("bad_structure", b"null"),
    ("bad_structure", b'{"samples": []}'),
    ("bad_structure", b'{"samples": {"y": 1}}'),
    ("bad_structure", b'{"samples": null}'),
    ("bad_structure", b'{"samples": [{"y": 1}], "y": 1}'),
    ("bad_encoding", b'{"y": 1, "u": {"\xff": 1}}'),
    ("bad_encoding", b'{"y": 1, "u": {"\xc0\xaf": 1}}'),       # overlong "/"
    ("bad_encoding", b'{"y": 1, "u": {"\xed\xa0\x80": 1}}'),   # an encoded lone surrogate
    ("bad_encoding", '{"y": 1}'.encode("utf-16")),
    ("too_deep", b'{"y": 1, "u": ' + b"[" * MAX_DEPTH + b"]" * MAX_DEPTH + b"}"),
    ("too_large", b'{"y": 1, "u": {"a": 1}}' + b" " * 65536),
]


@pytest.mark.parametrize(("reason", "data"), WHOLE_REASONS)
def test_whole_message_is_refused_with_its_reason(reason: str, data: bytes) -> None:
    samples, refusals = decode_payload(data)
    assert samples == []
    assert len(refusals) == 1
    assert refusals[0].reason == reason
    assert refusals[0].index is None
    assert 0 < len(refusals[0].detail) <= 100


def test_every_reason_code_has_an_example_and_a_docstring_entry() -> None:
    exercised = {r for r, _ in SAMPLE_REASONS} | {r for r, _ in WHOLE_REASONS} | {"missing_input"}
    assert exercised == REASONS
    doc = payload_module.__doc__ or ""
    assert all(f"``{reason}``\n" in doc for reason in REASONS)


def test_reason_does_not_depend_on_key_order() -> None:
    assert _reasons(decode_payload('{"sigma": -1, "y": "x"}')) == ["bad_type"]
    assert _reasons(decode_payload('{"y": "x", "sigma": -1}')) == ["bad_type"]
    assert _reasons(decode_payload('{"weight": -1, "t": "never", "y": 1}')) == ["bad_time"]


# --- NaN and infinity, spelled every way -----------------------------------------------------------------------

@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
@pytest.mark.parametrize("template", ['{"y": @}', '{"y": 1, "u": {"a": @}}', '{"y": 1, "sigma": @}',
                                      '{"y": 1, "t": @}', '{"samples": [{"y": 1}, {"y": @}]}'])
def test_nan_and_infinity_literals_are_malformed_json(literal: str, template: str) -> None:
    assert _reasons(decode_payload(template.replace("@", literal))) == ["malformed_json"]


@pytest.mark.parametrize("literal", ["-NaN", "nan", "inf", "+Infinity", "Inf", "NAN"])
def test_other_spellings_of_nan_are_not_json_at_all(literal: str) -> None:
    assert _reasons(decode_payload('{"y": ' + literal + "}")) == ["malformed_json"]


@pytest.mark.parametrize("text", ["nan", "NaN", "inf", "-inf", "Infinity", "-Infinity", "1e999"])
def test_nan_and_infinity_as_strings_are_bad_type(text: str) -> None:
    assert _reasons(_decode({"y": text})) == ["bad_type"]
    assert _reasons(_decode({"y": 1, "u": {"a": text}})) == ["bad_type"]


@pytest.mark.parametrize("number", ["1e999", "-1e999", "1E400", "-0.1e99999", str(10**400), "-" + "9" * 5000])
def test_numbers_beyond_float_range_are_non_finite(number: str) -> None:
    assert _reasons(decode_payload('{"y": ' + number + "}")) == ["non_finite"]
    assert _reasons(decode_payload('{"y": 1, "u": {"a": ' + number + "}}")) == ["non_finite"]


def test_tiny_numbers_underflow_to_zero_and_are_accepted() -> None:
    samples, _ = decode_payload('{"y": 1e-999, "u": {"a": -1e-400}}')
    assert samples[0].y == 0.0 and samples[0].inputs == {"a": 0.0}


# --- encoding, size, depth -------------------------------------------------------------------------------------


def test_str_with_lone_surrogate_is_bad_encoding() -> None:
    assert _reasons(decode_payload('{"y": 1, "u": {"\ud800": 1}}')) == ["bad_encoding"]


def test_escaped_lone_surrogate_in_a_key_is_still_json() -> None:
    # \ud800 as an escape is valid JSON text; the name is kept as Python gives it.
    samples, refusals = decode_payload('{"y": 1, "u": {"\\ud800": 1}}')
    assert refusals == [] and list(samples[0].inputs) == ["\ud800"]


def test_size_limit_counts_utf8_bytes_of_a_str() -> None:
    text = '{"y": 1, "u": {"' + "é" * 40 + '": 1}}'
    assert len(text) < 100 < len(text.encode())
    assert _reasons(decode_payload(text, max_bytes=100)) == ["too_large"]
    assert _reasons(decode_payload(text, max_bytes=len(text.encode()))) == []


def test_ten_megabyte_payload_is_refused_before_parsing(monkeypatch: pytest.MonkeyPatch) -> None:
    def no_parse(*args: object, **kwargs: object) -> None:
        raise AssertionError("an oversized payload must not be parsed")

    monkeypatch.setattr(payload_module.json, "loads", no_parse)
    sample = b'{"y": 1.0, "u": {"a": 2.0}}'
    data = b'{"samples": [' + b",".join([sample] * (10_000_000 // len(sample))) + b"]}"
    assert len(data) > 10_000_000
    for message in (data, data.decode()):
        samples, refusals = decode_payload(message)
        assert samples == []
        assert [r.reason for r in refusals] == ["too_large"]
        assert len(refusals[0].detail) <= 60


@pytest.mark.parametrize("opener", [b"[", b"{", b'{"a":', b'[{"a":'])
def test_nesting_100000_levels_is_too_deep_without_recursion_error(opener: bytes) -> None:
    data = opener * 100_000
    samples, refusals = decode_payload(data, max_bytes=len(data))
    assert samples == []
    assert refusals == [Refusal("too_deep", f"nested deeper than {MAX_DEPTH}", None)]


def test_deep_nesting_within_the_default_size_limit_is_too_deep() -> None:
    data = b"[" * 65536
    assert _reasons(decode_payload(data)) == ["too_deep"]


def test_nesting_at_the_limit_is_parsed() -> None:
    inner = "[" * (MAX_DEPTH - 2) + "1" + "]" * (MAX_DEPTH - 2)
    # The sample object and "u" make two levels: parsed, then refused for its content, not its depth.
    assert _reasons(decode_payload('{"y": 1, "u": {"a": ' + inner + "}}")) == ["bad_type"]
    assert _reasons(decode_payload('{"y": 1, "u": {"a": [' + inner + "]}}")) == ["too_deep"]


def test_brackets_inside_strings_do_not_count_as_nesting() -> None:
    name = '[[[[[[[[[[{{{{{{{{{{\\"]]'
    samples, refusals = decode_payload('{"y": 1, "u": {"' + name + '": 1}}')
    assert refusals == []
    assert list(samples[0].inputs) == ['[[[[[[[[[[{{{{{{{{{{"]]']


def test_unterminated_string_full_of_escaped_quotes_is_malformed_not_slow() -> None:
    # Each escaped quote could restart a naive string scan; the depth scan stays linear.
    data = b'"' + b'\\"' * 30_000
    assert _reasons(decode_payload(data)) == ["malformed_json"]


def test_batch_size_limit() -> None:
    batch = {"samples": [{"y": k} for k in range(3)]}
    assert len(_decode(batch, max_batch=3)[0]) == 3
    assert _reasons(_decode(batch, max_batch=2)) == ["bad_structure"]


def test_detail_never_carries_a_long_value() -> None:
    long = "x" * 5000
    for message in ({"y": 1, long: 1}, {"y": 1, "t": long}, {"y": 1, "seq": 10**300},
                    {"y": 1, "u": {long: "1"}}, {"y": 1, "u": {"a": 1}, long: {}}):
        _, refusals = _decode(message, input_names=[long[:3000]])
        assert len(refusals) == 1
        assert len(refusals[0].detail) <= 100


def test_caller_errors_raise() -> None:
    with pytest.raises(ValueError, match="max_bytes must be >= 1, got 0"):
        decode_payload(b"{}", max_bytes=0)
    with pytest.raises(ValueError, match="max_batch must be >= 1, got -1"):
        decode_payload(b"{}", max_batch=-1)
    with pytest.raises(TypeError, match="payload must be bytes or str, got dict"):
        decode_payload({"y": 1})  # type: ignore[arg-type]


# --- fuzz: never an exception, known reasons, finite accepted values ---------------------------------------------

_leaves = (st.none() | st.booleans() | st.integers() | st.sampled_from([10**400, -(10**400), 2**63])
           | st.floats() | st.text(max_size=20))
_json_values = st.recursive(_leaves, lambda inner: st.lists(inner, max_size=5)
                            | st.dictionaries(st.text(max_size=8), inner, max_size=5), max_leaves=30)
_good_numbers = st.floats(allow_nan=False, allow_infinity=False) | st.integers(-(10**6), 10**6)
_odd_numbers = st.floats() | st.sampled_from([10**400, -(10**400), 0, -1, 1e-200, 1e200]) | _leaves


def _mostly(good: st.SearchStrategy[Any], odd: st.SearchStrategy[Any]) -> st.SearchStrategy[Any]:
    """``good`` three times in four, so that many fuzzed samples get past the first check."""
    return st.tuples(st.integers(0, 3), good, odd).map(lambda drawn: drawn[2] if drawn[0] == 0 else drawn[1])


_numbers = _mostly(_good_numbers, _odd_numbers)
_times = st.one_of(_good_numbers, st.sampled_from(["2026-01-01T00:00:00Z", "2026-01-01T00:00", "1767225600"]),
                   st.sampled_from(["nan", "inf", "2026-02-30", "", "x", "9999-12-31T23:59:59-23:59"]), _leaves)
_inputs = st.dictionaries(st.sampled_from(["a", "b", "c"]), _numbers, max_size=3)
_seqs = st.integers(min_value=-2, max_value=2**64)
_sample_fields = {
    "t": _times,
    "u": _mostly(_inputs, _leaves),
    "sigma": _numbers,
    "weight": _numbers,
    "seq": _mostly(_seqs, _leaves),
}
_samples = _mostly(st.fixed_dictionaries({"y": _numbers}, optional=_sample_fields),
                   st.fixed_dictionaries({}, optional={**_sample_fields, "y": _numbers, "extra": _leaves}))


@FUZZ
@given(st.binary(max_size=300))
def test_fuzz_any_bytes_never_raise(data: bytes) -> None:
    _check_outcome(decode_payload(data))


@FUZZ
@given(_json_values, st.booleans())
def test_fuzz_any_json_value_never_raises(value: Any, as_batch: bool) -> None:
    message = {"samples": value} if as_batch else value
    _check_outcome(decode_payload(json.dumps(message), max_batch=3))


@FUZZ
@given(st.lists(_samples, min_size=1, max_size=6), st.booleans(), st.sampled_from([None, (), ("a",), ("a", "c")]))
def test_fuzz_sample_shaped_messages_answer_every_sample_once(samples: list[dict[str, Any]], as_batch: bool,
                                                             input_names: tuple[str, ...] | None) -> None:
    message: Any = {"samples": samples} if as_batch else samples[0]
    result = decode_payload(json.dumps(message), input_names=input_names)
    _check_outcome(result)
    accepted, refusals = result
    text = json.dumps(message)
    if "NaN" in text or "Infinity" in text:
        # json.dumps writes non-finite floats as literals, which this service refuses.
        assert [r.reason for r in refusals] == ["malformed_json"]
        return
    expected = list(range(len(samples))) if as_batch else [None]
    assert sorted([s.index for s in accepted] + [r.index for r in refusals], key=str) == sorted(expected, key=str)
    for sample in accepted:
        if input_names is not None:
            assert list(sample.inputs) == list(input_names)


@FUZZ
@given(st.text(alphabet='{}[]":,0123456789.eE-+ \\tnulrfalsNIy', max_size=80))
def test_fuzz_json_like_text_never_raises(text: str) -> None:
    _check_outcome(decode_payload(text))
