"""Two exported states compared whole: every array bit for bit, every scalar equal, every field by its name.

A state is what the estimator's objects export (``ChannelBank.state()``, ``RecursiveWLSBank.state()``, ...):
frozen dataclasses of arrays, scalars, mappings, tuples and further states. The walk takes the fields from
the dataclasses themselves, so a field added to a state class is compared without anyone listing it, and
a field one side has and the other lacks is a difference too. Each difference names its path, e.g.
``state.groups[2].watch.detectors.running[0, 3]``.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["assert_same_state", "state_differences"]


def assert_same_state(actual: object, expected: object) -> None:
    """Fail, listing every difference by its path, unless the two states are the same bits."""
    differences = state_differences(actual, expected)
    assert not differences, "states differ:\n  " + "\n  ".join(differences)


def state_differences(actual: object, expected: object, path: str = "state") -> list[str]:
    """Every place where ``actual`` and ``expected`` differ, as ``path: what differs`` (empty when the same).

    Arrays must agree in dtype, shape and bytes (so -0.0 differs from 0.0, and NaN payloads count);
    scalars in type and value (NaN equals NaN); mappings in their keys, whatever their order.
    """
    if dataclasses.is_dataclass(actual) and dataclasses.is_dataclass(expected):
        return _dataclass_differences(actual, expected, path)
    if isinstance(actual, np.ndarray) or isinstance(expected, np.ndarray):
        return _array_differences(actual, expected, path)
    if isinstance(actual, Mapping) and isinstance(expected, Mapping):
        found = [f"{path}[{key!r}]: only in {side}" for side, keys in
                 (("actual", actual.keys() - expected.keys()), ("expected", expected.keys() - actual.keys()))
                 for key in sorted(keys, key=repr)]
        for key in sorted(actual.keys() & expected.keys(), key=repr):
            found += state_differences(actual[key], expected[key], f"{path}[{key!r}]")
        return found
    if isinstance(actual, tuple | list) and isinstance(expected, tuple | list) and type(actual) is type(expected):
        if len(actual) != len(expected):
            return [f"{path}: {len(actual)} items, expected {len(expected)}"]
        return [d for k, (a, b) in enumerate(zip(actual, expected, strict=True))
                for d in state_differences(a, b, f"{path}[{k}]")]
    if type(actual) is not type(expected):
        return [f"{path}: {type(actual).__name__} {actual!r}, expected {type(expected).__name__} {expected!r}"]
    if isinstance(actual, float) and isinstance(expected, float) and math.isnan(actual) and math.isnan(expected):
        return []
    return [] if actual == expected else [f"{path}: {actual!r}, expected {expected!r}"]


def _dataclass_differences(actual: Any, expected: Any, path: str) -> list[str]:
    mine = [f.name for f in dataclasses.fields(actual)]
    theirs = [f.name for f in dataclasses.fields(expected)]
    found = [f"{path}.{name}: only in actual" for name in mine if name not in theirs]
    found += [f"{path}.{name}: only in expected" for name in theirs if name not in mine]
    if not found and type(actual) is not type(expected):
        found.append(f"{path}: {type(actual).__name__}, expected {type(expected).__name__}")
    for name in mine:
        if name in theirs:
            found += state_differences(getattr(actual, name), getattr(expected, name), f"{path}.{name}")
    return found


def _array_differences(actual: object, expected: object, path: str) -> list[str]:
    if not (isinstance(actual, np.ndarray) and isinstance(expected, np.ndarray)):
        return [f"{path}: {type(actual).__name__}, expected {type(expected).__name__}"]
    if actual.dtype != expected.dtype or actual.shape != expected.shape:
        return [f"{path}: {actual.dtype} {actual.shape}, expected {expected.dtype} {expected.shape}"]
    a, b = np.ascontiguousarray(actual), np.ascontiguousarray(expected)
    if a.tobytes() == b.tobytes():
        return []
    if a.ndim == 0:
        return [f"{path}: {a[()]!r}, expected {b[()]!r}"]
    # Element by element on the raw bytes: the first element whose bits differ, and how many do.
    width = a.dtype.itemsize
    differs = (a.view(np.uint8).reshape(*a.shape, width) != b.view(np.uint8).reshape(*b.shape, width)).any(axis=-1)
    where = tuple(int(i) for i in np.argwhere(differs)[0])
    return [f"{path}[{', '.join(map(str, where))}]: {a[where]!r}, expected {b[where]!r} "
            f"({int(differs.sum())} of {differs.size} elements differ)"]
