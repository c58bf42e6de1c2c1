"""Two snapshots of a bank's state compared bit for bit."""

from __future__ import annotations

from dataclasses import fields

import numpy as np

from estimator import BankState

__all__ = ["assert_same_bank_state"]


def assert_same_bank_state(actual: BankState, expected: BankState) -> None:
    """Every array of two :class:`BankState` snapshots identical: dtype, shape and bytes."""
    for field in fields(BankState):
        a = getattr(actual, field.name)
        b = getattr(expected, field.name)
        assert a.dtype == b.dtype, field.name
        assert a.shape == b.shape, field.name
        # Bytes, not values: stricter than array_equal (tells -0.0 from 0.0, NaN payloads).
        assert np.ascontiguousarray(a).tobytes() == np.ascontiguousarray(b).tobytes(), field.name
