"""Decoding the JSON sample payloads that arrive over MQTT and HTTP, with a reason code for every refusal.

Pure: no I/O, no clock, no module state. Channel-level checks (input lags,
ordering of timestamps, the weighting in force) happen later, in the channel.

Payload contract::

    {"t": 1767225600.5 | "2026-01-01T00:00:00Z", "y": 1.5, "u": {"flow": 2.0, ...},
     "sigma": 0.1, "weight": 4.0, "seq": 17}

Only ``y`` is required. ``t`` is epoch seconds or an ISO 8601 string (naive
means UTC). ``null`` for a field, or for one input inside ``u``, means the same
as leaving it out. The batch form ``{"samples": [sample, ...]}`` carries
samples that are applied in order; its other samples still decode when one is
refused. Every number in a sample is checked, extra inputs included; when
``input_names`` is given, only those inputs are handed on.

Reason codes (``REASONS``). The whole message is refused, ``index`` is None:

``too_large``
    More than ``max_bytes`` bytes (UTF-8); checked before anything is parsed.
``bad_encoding``
    Not valid UTF-8 (for a ``str`` payload: holds lone surrogates).
``too_deep``
    Arrays/objects nested deeper than ``MAX_DEPTH``; found by a linear scan
    before parsing, so no nesting depth can exhaust the stack.
``malformed_json``
    Not JSON, or JSON this service refuses: ``NaN``/``Infinity``/``-Infinity``
    literals, or an object with a duplicate key.
``bad_structure``
    The top level is not an object, or ``samples`` is not a non-empty list of at
    most ``max_batch`` items, or a batch object has keys besides ``samples``.

One sample is refused (in a batch, ``index`` is its position; for a single
sample, None). The first failed check, in this order, gives the reason, so it
does not depend on the order of keys:

``bad_type``
    The sample is not an object (checked first).
``unknown_field``
    A key other than ``t``, ``y``, ``u``, ``sigma``, ``weight``, ``seq``.
``missing_field``
    No ``y`` (or ``"y": null``).
``bad_type``
    ``y``, ``sigma`` or ``weight`` is not a number; ``t`` is neither a number
    nor a string; ``u`` is not an object of numbers; ``seq`` is not an integer
    in ``[0, 2**63)``. JSON ``true``/``false`` are not numbers, nor is the
    string ``"nan"``.
``bad_time``
    ``t`` is an unreadable string, or not finite (``1e400``, ``"inf"``).
``non_finite``
    ``y``, an input, ``sigma`` or ``weight`` is infinite: ``1e400`` reads as
    inf, and an integer literal too large for a float (``10**400``) overflows.
``bad_sigma``
    ``sigma <= 0``, or ``1 / sigma**2`` is not a finite positive weight
    (``sigma`` so small or so large that its square under- or overflows).
``bad_weight``
    ``weight <= 0``.
``missing_input``
    ``input_names`` is given and one of them is absent from ``u``.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Collection
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from estimator import SampleRefusal, sigma_is_usable, weight_is_usable
from service.broker_link.text_values import parse_time

__all__ = ["MAX_DEPTH", "REASONS", "DecodedSample", "PayloadRefusal", "Refusal", "decode_payload"]

MAX_DEPTH = 8
"""Deepest nesting of arrays and objects accepted; a batch of samples with inputs needs 4."""

class PayloadRefusal(StrEnum):
    """Why a payload, or one sample in it, is refused before the estimator sees it (the module docstring)."""

    TOO_LARGE = "too_large"
    BAD_ENCODING = "bad_encoding"
    TOO_DEEP = "too_deep"
    MALFORMED_JSON = "malformed_json"
    BAD_STRUCTURE = "bad_structure"
    BAD_TYPE = "bad_type"
    UNKNOWN_FIELD = "unknown_field"
    MISSING_FIELD = "missing_field"
    # The estimator's own reasons (estimator.SampleRefusal), found here already.
    BAD_TIME = SampleRefusal.BAD_TIME.value
    NON_FINITE = SampleRefusal.NON_FINITE.value
    BAD_SIGMA = SampleRefusal.BAD_SIGMA.value
    BAD_WEIGHT = SampleRefusal.BAD_WEIGHT.value
    MISSING_INPUT = SampleRefusal.MISSING_INPUT.value


REASONS = frozenset(PayloadRefusal)
FIELDS = ("t", "y", "u", "sigma", "weight", "seq")
_FIELD_SET = frozenset(FIELDS)

_SEQ_LIMIT = 2**63           # seq is stored as a signed 64-bit integer downstream
_INT_DIGITS = 400            # longer integer literals overflow a float anyway; int() would refuse > 4300
_DETAIL_CHARS = 40

# A string literal (an unterminated one runs to the end, so every match is linear) or one bracket.
_TOKENS = re.compile(r'"[^"\\]*(?:\\.[^"\\]*)*"?|[\[\]{}]', re.DOTALL)


@dataclass(frozen=True)
class DecodedSample:
    """One sample that passed the payload checks; every float is finite.

    ``index`` is the position inside a batch, None for a single-sample message.
    """

    t: float | None
    y: float
    inputs: dict[str, float]
    sigma: float | None
    weight: float | None
    seq: int | None
    index: int | None = None


@dataclass(frozen=True)
class Refusal:
    """A refused message or sample: its reason code, and ``detail``, short text.

    The sample decoders give :class:`PayloadRefusal` members; the tag decoders (``service.tags``) their own codes.
    """

    reason: str
    detail: str
    index: int | None


class _Refused(ValueError):
    """Raised inside the JSON parser's hooks: a constant or duplicate key this service refuses."""


class _SampleError(Exception):
    def __init__(self, reason: PayloadRefusal, detail: str) -> None:
        super().__init__(reason, detail)
        self.reason = reason
        self.detail = detail


def _short(value: object) -> str:
    """``repr`` cut to a few dozen characters, so a detail never carries the payload."""
    text = repr(value)
    return text if len(text) <= _DETAIL_CHARS else text[: _DETAIL_CHARS - 3] + "..."


def _refuse_constant(name: str) -> Any:
    raise _Refused(f"{name} is not a JSON number")


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    result = dict(pairs)
    if len(result) != len(pairs):
        seen: set[str] = set()
        for key, _ in pairs:
            if key in seen:
                raise _Refused(f"duplicate key {_short(key)}")
            seen.add(key)
    return result


def _parse_int(text: str) -> int | float:
    # A literal this long is beyond float range: hand back +-inf for the finiteness check.
    return int(text) if len(text) <= _INT_DIGITS else float(text)


def _too_deep(text: str, limit: int) -> bool:
    """True when brackets outside string literals nest deeper than ``limit`` (one pass, no recursion)."""
    if text.count("[") + text.count("{") <= limit:
        return False          # too few brackets to nest that deep: skip the scan (the usual sample)
    depth = 0
    for match in _TOKENS.finditer(text):
        char = match.group()[0]
        if char in "[{":
            depth += 1
            if depth > limit:
                return True
        elif char in "]}":
            depth -= 1
    return False


_STRING_LITERAL = re.compile(r'"(?:[^"\\]++|\\.)*+"')   # linear on valid JSON (every string is closed)
_NOT_BRACKET = re.compile(r"[^\[\]{}]+")
_INNERMOST_PAIR = re.compile(r"\[\]|\{\}")


def _nested_deeper(text: str, limit: int) -> bool:
    """True when a VALID JSON text nests arrays/objects deeper than ``limit``.

    Strings out, everything but brackets out, then each pass of removing the
    innermost ``[]``/``{}`` pairs takes exactly one level off: all C-speed
    passes, no Python loop over the document.
    """
    brackets = _NOT_BRACKET.sub("", _STRING_LITERAL.sub("", text))
    for _ in range(limit):
        if not brackets:
            return False
        brackets = _INNERMOST_PAIR.sub("", brackets)
    return bool(brackets)


def _is_number(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _finite(value: int | float, name: str, reason: PayloadRefusal) -> float:
    try:
        number = float(value)
    except OverflowError:
        raise _SampleError(reason, f"{name} is too large for a float") from None
    if not math.isfinite(number):
        raise _SampleError(reason, f"{name} is not finite")
    return number


def _plain_sample(raw: object, input_names: tuple[str, ...] | None, index: int | None) -> DecodedSample | None:
    """The common well-formed sample (floats, known keys, no sigma or weight), decoded on a short path.

    None when anything is unusual; :func:`_decode_sample` then does the full checks and finds the
    reason. Both give the same result for a sample this path accepts.
    """
    if type(raw) is not dict or not raw.keys() <= _FIELD_SET or "sigma" in raw or "weight" in raw:
        return None
    y, t, u, seq = raw.get("y"), raw.get("t"), raw.get("u"), raw.get("seq")
    if type(y) is not float or not math.isfinite(y):
        return None
    if t is not None and (type(t) is not float or not math.isfinite(t)):
        return None
    if seq is not None and (type(seq) is not int or not 0 <= seq < _SEQ_LIMIT):
        return None
    if u is None:
        u = {}
    elif type(u) is not dict or not all(type(v) is float and math.isfinite(v) for v in u.values()):
        return None
    if input_names is not None:
        if not all(name in u for name in input_names):
            return None
        u = {name: u[name] for name in input_names}
    return DecodedSample(t, y, u, None, None, seq, index)


def _decode_sample(raw: object, input_names: tuple[str, ...] | None, index: int | None) -> DecodedSample:
    """One sample object to a :class:`DecodedSample`; raises ``_SampleError`` with the reason."""
    plain = _plain_sample(raw, input_names, index)
    if plain is not None:
        return plain
    if not isinstance(raw, dict):
        raise _SampleError(PayloadRefusal.BAD_TYPE, f"sample must be an object, got {type(raw).__name__}")
    unknown = [key for key in raw if key not in FIELDS]
    if unknown:
        raise _SampleError(PayloadRefusal.UNKNOWN_FIELD, f"unknown field(s): {_short(unknown)}")
    fields = {key: value for key, value in raw.items() if value is not None}
    if "y" not in fields:
        raise _SampleError(PayloadRefusal.MISSING_FIELD, "y is required")

    # Types of every field first, so the reason does not depend on key order.
    for name in ("y", "sigma", "weight"):
        if name in fields and not _is_number(fields[name]):
            raise _SampleError(PayloadRefusal.BAD_TYPE, f"{name} must be a number, got {type(fields[name]).__name__}")
    t_raw = fields.get("t")
    if t_raw is not None and not (_is_number(t_raw) or isinstance(t_raw, str)):
        raise _SampleError(PayloadRefusal.BAD_TYPE,
                           f"t must be a number or an ISO 8601 string, got {type(t_raw).__name__}")
    u_raw = fields.get("u", {})
    if not isinstance(u_raw, dict):
        raise _SampleError(PayloadRefusal.BAD_TYPE, f"u must be an object, got {type(u_raw).__name__}")
    u_present = {name: value for name, value in u_raw.items() if value is not None}
    for name, value in u_present.items():
        if not _is_number(value):
            raise _SampleError(PayloadRefusal.BAD_TYPE,
                               f"input {_short(name)} must be a number, got {type(value).__name__}")
    seq = fields.get("seq")
    if seq is not None and not (isinstance(seq, int) and not isinstance(seq, bool) and 0 <= seq < _SEQ_LIMIT):
        raise _SampleError(PayloadRefusal.BAD_TYPE, f"seq must be an integer in [0, 2**63), got {_short(seq)}")

    t: float | None = None
    if isinstance(t_raw, str):
        try:
            t = parse_time(t_raw)
        except (ValueError, OverflowError, OSError):
            raise _SampleError(PayloadRefusal.BAD_TIME, f"cannot read time {_short(t_raw)}") from None
        if not math.isfinite(t):
            raise _SampleError(PayloadRefusal.BAD_TIME, f"time {_short(t_raw)} is not finite")
    elif t_raw is not None:
        t = _finite(t_raw, "t", PayloadRefusal.BAD_TIME)

    y = _finite(fields["y"], "y", PayloadRefusal.NON_FINITE)
    inputs = {name: _finite(value, f"input {_short(name)}", PayloadRefusal.NON_FINITE)
              for name, value in u_present.items()}
    sigma = _finite(fields["sigma"], "sigma", PayloadRefusal.NON_FINITE) if "sigma" in fields else None
    weight = _finite(fields["weight"], "weight", PayloadRefusal.NON_FINITE) if "weight" in fields else None

    # The estimator's rule (sigma_is_usable, weight_is_usable); here only to name the reason.
    if sigma is not None and not sigma_is_usable(sigma):
        if sigma <= 0.0:
            raise _SampleError(PayloadRefusal.BAD_SIGMA, f"sigma must be > 0, got {sigma!r}")
        # w = 1 / sigma^2 must be a finite positive weight: the square may under- or overflow.
        raise _SampleError(PayloadRefusal.BAD_SIGMA, f"sigma {sigma!r} gives no finite weight 1/sigma^2")
    if weight is not None and not weight_is_usable(weight):
        raise _SampleError(PayloadRefusal.BAD_WEIGHT, f"weight must be > 0, got {weight!r}")   # finite: checked above

    if input_names is not None:
        missing = [name for name in input_names if name not in inputs]
        if missing:
            raise _SampleError(PayloadRefusal.MISSING_INPUT, f"missing input(s): {_short(missing)}")
        inputs = {name: inputs[name] for name in input_names}
    return DecodedSample(t, y, inputs, sigma, weight, seq, index)


def _whole(reason: PayloadRefusal, detail: str) -> tuple[list[DecodedSample], list[Refusal]]:
    return [], [Refusal(reason, detail, None)]


def decode_payload(payload: bytes | str, *, max_bytes: int = 65536, max_batch: int = 10000,
                   input_names: Collection[str] | None = None) -> tuple[list[DecodedSample], list[Refusal]]:
    """Decode one message into samples and rejections; never raises on the message's content.

    Parameters
    ----------
    payload : bytes or str
        The raw message body; bytes must be UTF-8.
    max_bytes : int
        Largest accepted size in UTF-8 bytes, checked before parsing.
    max_batch : int
        Most samples accepted in one batch message.
    input_names : collection of str, optional
        Inputs every sample must carry in ``u``; when given, other inputs are
        checked but not returned.

    Returns
    -------
    samples : list of DecodedSample
        The accepted samples, in message order (``index`` tells their position).
    refusals : list of Refusal
        One per refused sample, in message order; or exactly one with
        ``index=None`` (and no samples) when the whole message is refused.
        Each ``reason`` is in ``REASONS``.

    Raises
    ------
    TypeError
        ``payload`` is neither bytes nor str (a caller bug, not bad input).
    ValueError
        ``max_bytes`` or ``max_batch`` is below 1.
    """
    if max_bytes < 1:
        raise ValueError(f"max_bytes must be >= 1, got {max_bytes}")
    if max_batch < 1:
        raise ValueError(f"max_batch must be >= 1, got {max_batch}")
    names = tuple(dict.fromkeys(input_names)) if input_names is not None else None

    if isinstance(payload, str):
        # Every character takes at least one UTF-8 byte: a long string is refused without encoding it.
        if len(payload) > max_bytes:
            return _whole(PayloadRefusal.TOO_LARGE, f"more than {max_bytes} bytes")
        try:
            size = len(payload.encode("utf-8"))
        except UnicodeEncodeError as exc:
            return _whole(PayloadRefusal.BAD_ENCODING, f"not encodable as UTF-8 at character {exc.start}")
        if size > max_bytes:
            return _whole(PayloadRefusal.TOO_LARGE, f"{size} bytes, limit {max_bytes}")
        text = payload
    elif isinstance(payload, bytes | bytearray | memoryview):
        size = memoryview(payload).nbytes
        if size > max_bytes:
            return _whole(PayloadRefusal.TOO_LARGE, f"{size} bytes, limit {max_bytes}")
        try:
            text = bytes(payload).decode("utf-8")
        except UnicodeDecodeError as exc:
            return _whole(PayloadRefusal.BAD_ENCODING, f"not UTF-8 at byte {exc.start}")
    else:
        raise TypeError(f"payload must be bytes or str, got {type(payload).__name__}")

    # Depth: with few brackets nothing can nest too deep; otherwise the C parser runs first
    # (it raises RecursionError rather than exhaust the stack) and the parsed document is
    # measured, which is cheaper than scanning the text of a large batch. A document that
    # does not parse is scanned, so a deep malformed one is still reported as too deep.
    shallow = text.count("[") + text.count("{") <= MAX_DEPTH
    too_deep = _whole(PayloadRefusal.TOO_DEEP, f"nested deeper than {MAX_DEPTH}")
    try:
        document = json.loads(text, parse_constant=_refuse_constant, object_pairs_hook=_no_duplicates,
                              parse_int=_parse_int)
    except RecursionError:
        return too_deep
    except (_Refused, ValueError) as exc:
        if not shallow and _too_deep(text, MAX_DEPTH):
            return too_deep
        if isinstance(exc, json.JSONDecodeError):
            return _whole(PayloadRefusal.MALFORMED_JSON, f"{exc.msg} (line {exc.lineno}, column {exc.colno})")
        return _whole(PayloadRefusal.MALFORMED_JSON, str(exc) if isinstance(exc, _Refused) else type(exc).__name__)
    if not shallow and _nested_deeper(text, MAX_DEPTH):
        return too_deep

    if not isinstance(document, dict):
        return _whole(PayloadRefusal.BAD_STRUCTURE, f"top level must be an object, got {type(document).__name__}")
    if "samples" not in document:
        raws: list[object] = [document]
        indexes: list[int | None] = [None]
    else:
        batch = document["samples"]
        if len(document) != 1:
            return _whole(PayloadRefusal.BAD_STRUCTURE, "a batch object holds only 'samples'")
        if not isinstance(batch, list) or not batch:
            return _whole(PayloadRefusal.BAD_STRUCTURE, "samples must be a non-empty list")
        if len(batch) > max_batch:
            return _whole(PayloadRefusal.BAD_STRUCTURE, f"{len(batch)} samples, limit {max_batch}")
        raws = batch
        indexes = list(range(len(batch)))

    samples: list[DecodedSample] = []
    refusals: list[Refusal] = []
    for index, raw in zip(indexes, raws, strict=True):
        try:
            samples.append(_decode_sample(raw, names, index))
        except _SampleError as exc:
            refusals.append(Refusal(exc.reason, exc.detail, index))
    return samples, refusals
