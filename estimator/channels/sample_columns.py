"""One channel's samples field by field: the columnar form of a micro-batch.

A batch payload of a hundred samples decodes most cheaply into one list per
field rather than a hundred sample objects, and the bank turns lists into
arrays once per group of channels (:mod:`estimator.channels.column_rounds`). An entry
is None where a sample lacks that field; ``samples`` gives back the
one-object-per-sample form that the exact path (:meth:`ChannelBank.apply`)
takes, so any micro-batch can fall back to it unchanged.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from estimator.channels.channel import Sample

__all__ = ["AppliedRows", "ColumnsOutcome", "SampleColumns"]


@dataclass
class SampleColumns:
    """Samples of one channel in arrival order, one list per field (all of one length).

    ``inputs`` maps an input name to its values; None where a sample lacks
    that input (or the field).
    """

    y: list[float] = field(default_factory=list)
    inputs: dict[str, list[float | None]] = field(default_factory=dict)
    t: list[float | None] = field(default_factory=list)
    sigma: list[float | None] = field(default_factory=list)
    weight: list[float | None] = field(default_factory=list)
    seq: list[int | None] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.y)

    def append(self, y: float, inputs: Mapping[str, float], t: float | None = None,
               sigma: float | None = None, weight: float | None = None, seq: int | None = None) -> None:
        """Add one sample at the end."""
        count = len(self.y)
        for name in inputs:
            if name not in self.inputs:
                self.inputs[name] = [None] * count
        for name, values in self.inputs.items():
            values.append(inputs.get(name))
        self.y.append(y)
        self.t.append(t)
        self.sigma.append(sigma)
        self.weight.append(weight)
        self.seq.append(seq)

    def extend(self, other: SampleColumns) -> None:
        """Add every sample of ``other`` at the end, in its order."""
        count, more = len(self.y), len(other.y)
        for name in other.inputs:
            if name not in self.inputs:
                self.inputs[name] = [None] * count
        for name, values in self.inputs.items():
            values.extend(other.inputs.get(name, [None] * more))
        self.y.extend(other.y)
        self.t.extend(other.t)
        self.sigma.extend(other.sigma)
        self.weight.extend(other.weight)
        self.seq.extend(other.seq)

    def samples(self, channel: str, start: int = 0) -> list[Sample]:
        """Samples ``start`` onwards as :class:`Sample` objects (inputs that are None left out)."""
        names = tuple(self.inputs)
        columns = [self.inputs[name][start:] for name in names]
        count = len(self.y) - start
        if not names:
            inputs: list[dict[str, float]] = [{} for _ in range(count)]
        elif any(None in column for column in columns):
            inputs = [{n: v for n, v in zip(names, values, strict=True) if v is not None}
                      for values in zip(*columns, strict=True)]
        else:
            inputs = [dict(zip(names, values, strict=True)) for values in zip(*columns, strict=True)]
        return [Sample(channel, *fields) for fields in zip(self.y[start:], inputs, self.t[start:], self.sigma[start:],
                                                           self.weight[start:], self.seq[start:], strict=True)]

    @classmethod
    def from_samples(cls, samples: Sequence[Sample]) -> SampleColumns:
        """The columns of ``samples`` (their ``channel`` is not kept)."""
        columns = cls()
        for s in samples:
            columns.append(s.y, s.inputs, s.t, s.sigma, s.weight, s.seq)
        return columns


@dataclass(frozen=True)
class AppliedRows:
    """The samples of one channel's columns that were fitted, in order, as the recursion used them.

    ``position`` : ndarray, shape (k,), int — each row's place in the columns;
    ``Z`` : ndarray, shape (k, n_params) — regressor rows; ``y`` : ndarray, shape (k,);
    ``w`` : ndarray, shape (k,) — the weight each update used (tracked weights as made before the sample).
    """

    position: NDArray[np.intp]
    Z: NDArray[np.float64]
    y: NDArray[np.float64]
    w: NDArray[np.float64]

    @classmethod
    def join(cls, parts: Sequence[AppliedRows], n_params: int) -> AppliedRows:
        """The parts one after the other (none: no rows)."""
        if not parts:
            return cls(np.zeros(0, dtype=np.intp), np.zeros((0, n_params)), np.zeros(0), np.zeros(0))
        if len(parts) == 1:
            return parts[0]
        return cls(np.concatenate([p.position for p in parts]), np.concatenate([p.Z for p in parts]),
                   np.concatenate([p.y for p in parts]), np.concatenate([p.w for p in parts]))


@dataclass
class ColumnsOutcome:
    """What happened to one channel's columns.

    ``refused`` lists ``(position, reason)`` in position order; ``last_applied``
    is the position of the last sample fitted (None if none was); ``rows`` the fitted
    samples (only when asked for, see :meth:`ChannelBank.apply_columns`).
    """

    applied: int = 0
    warmup: int = 0
    refused: list[tuple[int, str]] = field(default_factory=list)
    last_applied: int | None = None
    rows: AppliedRows | None = None
