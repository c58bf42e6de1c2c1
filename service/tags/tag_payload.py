"""Decoding one tag message into a reading (value, time stamp, quality), with a reason code for every refusal.

Pure: no I/O, no clock (the arrival time is an argument), no module state. Two formats
(:class:`~service.config.tag_settings.TagFormatConfig`):

``number``
    The whole message is a bare number as text (``12.5``, `` -3e-2``; ASCII, white space around it
    ignored, no digit separators). It is stamped with its arrival time and is always good.
``json``
    A JSON document; JSON Pointers (RFC 6901) name the value, and optionally the time stamp (epoch
    seconds, epoch milliseconds or ISO 8601, naive meaning UTC: ``time_unit``) and the quality. A
    value may be a JSON number or a string holding a plain decimal number (some gateways quote their
    values); a time in ``s`` or ``ms`` likewise. A quality is good when it equals one of the
    configured ``good`` values, compared by JSON type and value (``192`` and ``192.0`` match the
    number 192, neither matches the string ``"192"`` or ``true``). Without a time pointer the value is
    stamped on arrival; without a quality pointer it is good. Of duplicate keys the last one counts.

Refusal reasons (``PAYLOAD_REASONS``). The first failed check gives the reason, in the order size, parsing,
value, time, quality; ``detail`` is short text, never the payload:

``too_large``         more than ``max_bytes`` bytes, checked before anything is parsed
``bad_json``          (json) not JSON (``NaN`` literals, bad UTF-8, truncated), or nested too deep
``non_finite``        (json) a number in the document is beyond float range (``1e400``: the parser refuses
                      such a document whole); or the value is infinite or NaN (``"inf"``, ``nan`` as text)
``missing_value``     (json) nothing, or ``null``, at the value pointer
``not_a_number``      the message (number) or the value (json) is not a number: text that is not a plain
                      decimal, a boolean, an object or array, an empty message
``missing_time``      (json) a time pointer is configured and nothing, or ``null``, is there
``bad_time``          (json) the time stamp is of the wrong type for ``time_unit``, unreadable, or not finite
``missing_quality``   (json) a quality pointer is configured and nothing, or ``null``, is there
``bad_quality``       (json) the quality is an object or an array

A quality that is not among the good values is no refusal: the reading comes out with ``good=False``
and the sample assembly decides what that means (:mod:`service.tags.assembler`).
"""

from __future__ import annotations

import math
from datetime import UTC, datetime
from typing import Protocol

import msgspec

from service.broker_link.payload import Refusal
from service.broker_link.tag_reading import TagReading
from service.broker_link.tag_refusal import TAG_PAYLOAD_REASONS, TagRefusal
from service.broker_link.text_values import parse_number
from service.config.tag_settings import TagFormatConfig
from service.tags.json_pointer import MISSING, JsonPointer

__all__ = ["PAYLOAD_REASONS", "JsonTagDecoder", "NumberTagDecoder", "TagDecoder", "TagReading", "make_decoder"]

PAYLOAD_REASONS = TAG_PAYLOAD_REASONS

_DETAIL_CHARS = 40
_MS_PER_S = 1000.0


class TagDecoder(Protocol):
    """Decodes the messages of one payload format."""

    def decode(self, payload: bytes, arrival: float) -> TagReading | Refusal:
        """The reading of one message, or its refusal; ``arrival`` in epoch seconds. Never raises on content."""
        ...


class _Refused(Exception):
    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(reason, detail)
        self.refusal = Refusal(reason, detail, None)


def _short(value: object) -> str:
    """``repr`` cut to a few dozen characters, so a detail never carries the payload."""
    text = repr(value)
    return text if len(text) <= _DETAIL_CHARS else text[: _DETAIL_CHARS - 3] + "..."


def _too_large(payload: bytes, arrival: float, max_bytes: int) -> Refusal | None:
    """The size refusal, checked before anything is parsed (and the caller's arrival time, a programming error)."""
    if not math.isfinite(arrival):
        raise ValueError(f"arrival must be finite epoch seconds, got {arrival!r}")
    size = len(payload)
    return Refusal(TagRefusal.TOO_LARGE, f"{size} bytes, limit {max_bytes}", None) if size > max_bytes else None


def _number(raw: object, what: str, reason_not_number: str, reason_not_finite: str) -> float:
    """A JSON number, or a string holding a plain decimal, as a finite float; ``_Refused`` otherwise."""
    if type(raw) is float:
        number = raw
    elif type(raw) is int:
        try:
            number = float(raw)
        except OverflowError:
            raise _Refused(reason_not_finite, f"{what} is beyond float range") from None
    elif type(raw) is str:
        try:
            number = parse_number(raw.strip())
        except ValueError:
            raise _Refused(reason_not_number, f"{what} {_short(raw)} is not a number") from None
    else:
        raise _Refused(reason_not_number, f"{what} must be a number, got {type(raw).__name__}")
    if not math.isfinite(number):
        raise _Refused(reason_not_finite, f"{what} is not finite")
    return number


class NumberTagDecoder:
    """Format ``number``: the message is a bare number as text, stamped on arrival, always good."""

    __slots__ = ("max_bytes",)

    def __init__(self, max_bytes: int = 65536) -> None:
        if max_bytes < 1:
            raise ValueError(f"max_bytes must be >= 1, got {max_bytes}")
        self.max_bytes = max_bytes

    def decode(self, payload: bytes, arrival: float) -> TagReading | Refusal:
        refused = _too_large(payload, arrival, self.max_bytes)
        if refused is not None:
            return refused
        try:
            text = payload.decode("ascii").strip()
        except UnicodeDecodeError as exc:
            return Refusal(TagRefusal.NOT_A_NUMBER, f"not ASCII text (byte {exc.start})", None)
        if not text:
            return Refusal(TagRefusal.NOT_A_NUMBER, "empty message", None)
        try:
            value = parse_number(text)
        except ValueError:
            return Refusal(TagRefusal.NOT_A_NUMBER, f"{_short(text)} is not a number", None)
        if not math.isfinite(value):
            return Refusal(TagRefusal.NON_FINITE, f"{_short(text)} is not finite", None)
        return TagReading(value, arrival, True)


_PLAIN = msgspec.json.Decoder()
# Reads a float literal beyond float range as +-inf instead of refusing the whole document, so only
# the fields this format reads are judged. Several times slower: used only after the plain decoder refused.
_WIDE = msgspec.json.Decoder(float_hook=float)


def _parse(payload: bytes) -> object:
    try:
        return _PLAIN.decode(payload)
    except msgspec.ValidationError:
        pass                                   # a number out of range: try again, reading it as inf
    except msgspec.DecodeError as exc:
        raise _Refused(TagRefusal.BAD_JSON, str(exc)[:80]) from None
    except RecursionError:
        raise _Refused(TagRefusal.BAD_JSON, "nested too deep") from None
    try:
        return _WIDE.decode(payload)
    except msgspec.ValidationError:            # an integer literal too long even for the hook
        raise _Refused(TagRefusal.NON_FINITE, "a number in the message is beyond float range") from None


class JsonTagDecoder:
    """Format ``json``: value, time stamp and quality found by JSON Pointers (see the module docstring)."""

    __slots__ = ("_good_bool", "_good_number", "_good_text", "_quality", "_time", "_time_unit", "_value",
                 "max_bytes")

    def __init__(self, fmt: TagFormatConfig, max_bytes: int = 65536) -> None:
        if fmt.kind != "json" or fmt.value is None:
            raise ValueError(f"JsonTagDecoder needs a format of kind 'json' with a value pointer, got {fmt!r}")
        if max_bytes < 1:
            raise ValueError(f"max_bytes must be >= 1, got {max_bytes}")
        self.max_bytes = max_bytes
        self._value = JsonPointer(fmt.value)
        self._time = JsonPointer(fmt.time) if fmt.time is not None else None
        self._time_unit = fmt.time_unit
        self._quality = JsonPointer(fmt.quality) if fmt.quality is not None else None
        self._good_text = frozenset(v for v in fmt.good if type(v) is str)
        self._good_bool = frozenset(v for v in fmt.good if type(v) is bool)
        self._good_number = frozenset(v for v in fmt.good if type(v) is int)

    def decode(self, payload: bytes, arrival: float) -> TagReading | Refusal:
        refused = _too_large(payload, arrival, self.max_bytes)
        if refused is not None:
            return refused
        try:
            document = _parse(payload)
            raw = self._value.resolve(document)
            if raw is MISSING or raw is None:
                raise _Refused(TagRefusal.MISSING_VALUE, f"nothing at {self._value.text!r}")
            value = _number(raw, "value", TagRefusal.NOT_A_NUMBER, TagRefusal.NON_FINITE)
            t = arrival if self._time is None else self._stamp(document, self._time)
            good = True if self._quality is None else self._good(document, self._quality)
        except _Refused as exc:
            return exc.refusal
        return TagReading(value, t, good)

    def _stamp(self, document: object, pointer: JsonPointer) -> float:
        raw = pointer.resolve(document)
        if raw is MISSING or raw is None:
            raise _Refused(TagRefusal.MISSING_TIME, f"nothing at {pointer.text!r}")
        if self._time_unit == "iso8601":
            if type(raw) is not str:
                raise _Refused(TagRefusal.BAD_TIME, f"time must be an ISO 8601 string, got {type(raw).__name__}")
            try:
                stamp = datetime.fromisoformat(raw.strip())
                if stamp.tzinfo is None:
                    stamp = stamp.replace(tzinfo=UTC)
                seconds = stamp.timestamp()
            except (ValueError, OverflowError, OSError):
                raise _Refused(TagRefusal.BAD_TIME, f"cannot read time {_short(raw)}") from None
            return seconds
        number = _number(raw, "time", TagRefusal.BAD_TIME, TagRefusal.BAD_TIME)
        seconds = number / _MS_PER_S if self._time_unit == "ms" else number
        return seconds

    def _good(self, document: object, pointer: JsonPointer) -> bool:
        raw = pointer.resolve(document)
        if raw is MISSING or raw is None:
            raise _Refused(TagRefusal.MISSING_QUALITY, f"nothing at {pointer.text!r}")
        kind = type(raw)
        if kind is str:
            return raw in self._good_text
        if kind is bool:
            return raw in self._good_bool
        if kind is int or kind is float:
            return raw in self._good_number          # 192.0 == 192 (and hashes alike); NaN matches nothing
        raise _Refused(TagRefusal.BAD_QUALITY, f"quality must be a string, number or boolean, got {kind.__name__}")


def make_decoder(fmt: TagFormatConfig, max_bytes: int = 65536) -> NumberTagDecoder | JsonTagDecoder:
    """The decoder of a configured payload format."""
    if fmt.kind == "number":
        return NumberTagDecoder(max_bytes)
    return JsonTagDecoder(fmt, max_bytes)
