"""The columnar short path of payload decoding agrees with the exact decoder whenever it answers."""

from __future__ import annotations

import json
import math
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.broker_link.payload import decode_payload
from service.broker_link.payload_columns import decode_columns

FUZZ = settings(max_examples=400, deadline=None, derandomize=True, database=None)
NAMES = ("a", "b")


def _agrees(payload: bytes, names: tuple[str, ...] = NAMES) -> bool:
    """Whether decode_columns answered; when it did, the exact decoder accepted the same samples."""
    fast = decode_columns(payload, input_names=names)
    if fast is None:
        return False
    columns, is_batch = fast
    samples, refusals = decode_payload(payload, input_names=names)
    assert refusals == []
    assert len(samples) == len(columns)
    for k, s in enumerate(samples):
        assert s.index == (k if is_batch else None)
        for mine, theirs in ((columns.y[k], s.y), (columns.t[k], s.t), (columns.sigma[k], s.sigma),
                             (columns.weight[k], s.weight)):
            assert (mine is None and theirs is None) or (type(mine) is float and mine == theirs
                                                          and math.copysign(1, mine) == math.copysign(1, theirs))
        assert columns.seq[k] == s.seq
        assert {name: columns.inputs[name][k] for name in names} == s.inputs
    return True


def _plain(k: int) -> dict[str, Any]:
    return {"t": 1767225600.0 + k, "y": 0.5 * k - 1.25, "u": {"a": k / 3.0, "b": -k}, "seq": k}


def test_plain_single_and_batch_messages_take_the_short_path() -> None:
    assert _agrees(json.dumps(_plain(3)).encode())
    assert _agrees(json.dumps({"samples": [_plain(k) for k in range(100)]}).encode())
    assert _agrees(b'{"y": 1, "u": {"a": 2, "b": 3, "extra": 4.5}, "sigma": 0.1, "weight": 2}')
    assert _agrees(b' { "samples" : [ {"y": -0.0, "u": {"a": 1e-300, "b": 1E5}} ] } ')


@pytest.mark.parametrize("payload", [
    b'{"y": 1, "y": 2, "u": {"a": 1, "b": 2}}',                       # duplicate key
    b'{"y": 1, "u": {"a": 1, "a": 2, "b": 2}}',                       # duplicate input
    b'{"samples": [{"y": 1, "u": {"a": 1, "b": 2}}], "samples": []}',
    b'{"y": 1, "u": {"a": 1, "b": 2}, "sigma": null}',                # explicit null
    b'{"y": 1, "u": {"a": 1}}',                                        # missing input
    b'{"y": NaN, "u": {"a": 1, "b": 2}}',
    b'{"y": 1e400, "u": {"a": 1, "b": 2}}',
    b'{"y": 1, "u": {"a": 1, "b": 2}, "t": "2026-01-01T00:00:00Z"}',  # ISO time: the exact decoder reads it
    b'{"y": 1, "u": {"a": 1, "b": 2}, "seq": -1}',
    b'{"y": 1, "u": {"a": 1, "b": 2}, "seq": 9223372036854775808}',
    b'{"y": 1, "u": {"a": 1, "b": 2}, "sigma": 0}',
    b'{"y": 1, "u": {"a": 1, "b": 2}, "sigma": 1e-200}',              # 1 / sigma^2 overflows
    b'{"y": 1, "u": {"a": 1, "b": 2}, "weight": -2}',
    b'{"y": true, "u": {"a": 1, "b": 2}}',
    b'{"y": 1, "u": {"a": 1, "b": 2}, "colour": 1}',
    b'{"samples": []}',
    b'{"y": 1, "u": {"a": 1, "b\\u0000": 2}}',                        # escapes
    '{"y": 1, "u": {"a": 1, "b": 2, "\u00e9": 3}}'.encode(),           # not ASCII
    b'[{"y": 1}]',
    b'{"y": 1, "u": {"a": 1, "b": 2}} trailing',
])
def test_unusual_messages_are_left_to_the_exact_decoder(payload: bytes) -> None:
    assert decode_columns(payload, input_names=NAMES) is None


def test_size_and_batch_limits_match_the_exact_decoder() -> None:
    message = json.dumps({"samples": [_plain(k) for k in range(20)]}).encode()
    assert decode_columns(message, input_names=NAMES, max_bytes=len(message) - 1) is None
    assert decode_columns(message, input_names=NAMES, max_batch=19) is None
    assert decode_columns(bytearray(message), input_names=NAMES) is None      # bytes only


_numbers = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False).map(repr),
    st.integers(-(10**30), 10**30).map(str),
    st.sampled_from(["0", "-0", "-0.0", "1e308", "1.7976931348623157e308", "2e308", "4.9e-324", "5e-325",
                     "1E-5", "123456789012345678901234567890", "1" + "0" * 400, "true", "null", '"1"']),
)
_positive = st.floats(1e-300, 1e300).map(repr)
_optional = {"t": st.floats(0, 4e9).map(repr), "sigma": _positive, "weight": _positive,
             "seq": st.integers(0, 2**63 - 1).map(str)}
_faults = st.sampled_from(["duplicate y", "duplicate input", "drop y", "drop input", "unknown key", "null",
                           "odd number", "odd seq", "odd sigma", "odd weight"])


@st.composite
def _sample_texts(draw: st.DrawFn) -> str:
    """Mostly well-formed samples, some with one fault: both decoders must then agree or the short path abstain."""
    inputs = [("a", draw(st.floats(-1e3, 1e3).map(repr))), ("b", draw(st.integers(-5, 5).map(str)))]
    members: dict[str, object] = {"y": draw(st.floats(-1e6, 1e6).map(repr)), "u": inputs}
    for key, values in _optional.items():
        if draw(st.booleans()):
            members[key] = draw(values)
    extra: list[str] = []
    fault = draw(st.one_of(st.none(), _faults))
    if fault == "duplicate y":
        extra.append(f'"y": {draw(_numbers)}')
    elif fault == "duplicate input":
        inputs.append(("a", "1"))
    elif fault == "drop y":
        del members["y"]
    elif fault == "drop input":
        inputs.pop()
    elif fault == "unknown key":
        extra.append('"colour": 1')
    elif fault == "null":
        members[draw(st.sampled_from(["y", "t", "sigma", "weight", "seq", "u"]))] = "null"
    elif fault == "odd number":
        members["y"] = draw(_numbers)
    elif fault == "odd seq":
        members["seq"] = draw(st.one_of(st.integers(-3, 2**64).map(str), _numbers))
    elif fault == "odd sigma":
        members["sigma"] = draw(_numbers)
    elif fault == "odd weight":
        members["weight"] = draw(_numbers)
    parts = []
    for key, value in members.items():
        if isinstance(value, list):
            value = "{" + ", ".join(f'"{name}": {number}' for name, number in value) + "}"
        parts.append(f'"{key}": {value}')
    return "{" + ", ".join(parts + extra) + "}"


@FUZZ
@given(st.lists(_sample_texts(), min_size=1, max_size=5), st.booleans())
def test_whenever_the_short_path_answers_the_exact_decoder_accepts_the_same(texts: list[str], batch: bool) -> None:
    text = '{"samples": [' + ", ".join(texts) + "]}" if batch else texts[0]
    _agrees(text.encode())


@FUZZ
@given(st.binary(max_size=200))
def test_random_bytes_never_raise(data: bytes) -> None:
    _agrees(data)
