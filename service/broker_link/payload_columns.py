"""The short path of payload decoding: a plain well-formed message straight into columns.

:func:`service.broker_link.payload.decode_payload` is the contract and finds every
refusal's reason. Most messages break no rule at all, and for those this
module does the same work several times faster: msgspec parses the JSON into
typed structs in C, and the samples come out as one list per field
(:class:`~estimator.channels.sample_columns.SampleColumns`) with no per-sample object.

It answers None whenever it cannot vouch that the exact decoder would accept
every sample with the same values; the caller then runs the exact decoder.
That covers anything unusual: not ASCII (so no encoding question), a
backslash (escapes), ISO 8601 times, explicit nulls, duplicate keys,
non-finite or out-of-range numbers, a missing input, bad sigma or weight, a
seq out of range, an empty or oversized batch. Duplicate keys are caught
without a hook: in a document whose only strings are keys, each key is two
quote characters, so the quotes in the text must be twice the keys decoded.
A property test holds this module to the exact decoder.
"""

from __future__ import annotations

from collections.abc import Sequence

import msgspec

from estimator import SampleColumns, sigma_is_usable, weight_is_usable

__all__ = ["decode_columns"]

_SEQ_LIMIT = 2**63


class _Wire(msgspec.Struct, forbid_unknown_fields=True):
    y: float
    t: float | None = None
    u: dict[str, float] | None = None
    sigma: float | None = None
    weight: float | None = None
    seq: int | None = None


class _WireBatch(msgspec.Struct, forbid_unknown_fields=True):
    samples: list[_Wire]


_ONE = msgspec.json.Decoder(_Wire)
_BATCH = msgspec.json.Decoder(_WireBatch)


def _present(values: Sequence[object]) -> int:
    return len(values) - values.count(None)


def decode_columns(payload: bytes, *, input_names: tuple[str, ...], max_bytes: int = 65536,
                   max_batch: int = 10000) -> tuple[SampleColumns, bool] | None:
    """Decode a message whose samples the exact decoder would all accept, or return None.

    Parameters
    ----------
    payload : bytes
        The raw message body.
    input_names : tuple of str
        Inputs every sample must carry; only these are kept, as
        :func:`~service.broker_link.payload.decode_payload` does.
    max_bytes, max_batch : int
        As for :func:`~service.broker_link.payload.decode_payload`.

    Returns
    -------
    (columns, is_batch) or None
        ``is_batch`` tells whether the message was ``{"samples": [...]}``
        (sample indexes are then the positions) or a single sample.
    """
    if type(payload) is not bytes or len(payload) > max_bytes or not payload.isascii() or b"\\" in payload:
        return None
    is_batch = b'"samples"' in payload
    try:
        if not is_batch:
            return _single(payload, _ONE.decode(payload), input_names)
        wires = _BATCH.decode(payload).samples
    except (msgspec.DecodeError, msgspec.ValidationError):
        return None
    count = len(wires)
    if not 0 < count <= max_batch:
        return None
    y = [w.y for w in wires]
    t = [w.t for w in wires]
    sigma = [w.sigma for w in wires]
    weight = [w.weight for w in wires]
    seq = [w.seq for w in wires]
    us = [w.u for w in wires]
    given_u, given_sigma, given_weight, given_seq = _present(us), _present(sigma), _present(weight), _present(seq)
    keys = (int(is_batch) + count + _present(t) + given_u + given_sigma + given_weight + given_seq
            + sum(len(u) for u in us if u is not None))
    if payload.count(b'"') != 2 * keys:
        return None                                  # a duplicate key, or a null given explicitly
    try:
        inputs: dict[str, list[float | None]] = {name: [u[name] for u in us] for name in input_names}  # type: ignore[index]
    except (KeyError, TypeError):
        return None                                  # missing_input
    if given_sigma and not all(sigma_is_usable(s) for s in sigma if s is not None):
        return None
    if given_weight and not all(weight_is_usable(w) for w in weight if w is not None):
        return None
    if given_seq and not all(0 <= s < _SEQ_LIMIT for s in seq if s is not None):
        return None
    return SampleColumns(y=y, inputs=inputs, t=t, sigma=sigma, weight=weight, seq=seq), is_batch


def _single(payload: bytes, w: _Wire, input_names: tuple[str, ...]) -> tuple[SampleColumns, bool] | None:
    """:func:`decode_columns` for a single-sample message: the same checks on scalars."""
    u = w.u
    optional = (w.t is not None) + (w.sigma is not None) + (w.weight is not None) + (w.seq is not None)
    keys = 1 + optional + (0 if u is None else 1 + len(u))
    if payload.count(b'"') != 2 * keys:
        return None
    if input_names:
        if u is None or not u.keys() >= set(input_names):
            return None
        inputs: dict[str, list[float | None]] = {name: [u[name]] for name in input_names}
    else:
        inputs = {}
    if (w.sigma is not None and not sigma_is_usable(w.sigma)) \
            or (w.weight is not None and not weight_is_usable(w.weight)) \
            or (w.seq is not None and not 0 <= w.seq < _SEQ_LIMIT):
        return None
    return SampleColumns(y=[w.y], inputs=inputs, t=[w.t], sigma=[w.sigma], weight=[w.weight], seq=[w.seq]), False

