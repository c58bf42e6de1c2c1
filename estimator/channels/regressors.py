"""Regressor vectors from a channel's term list.

A term list such as ``["1", "ref_temp", "speed^2", "load*speed", "u[-2]", "y[-1]"]``
defines ``z_k``. Grammar (whitespace ignored)::

    term   := "1" | factor ("*" factor)*
    factor := NAME ["[-" LAG "]"] ["^" POWER]       LAG >= 1, POWER >= 1
    NAME   := letter or "_", then letters, digits, "_" or "."

``y[-k]`` is the channel's own output k accepted samples back (ARX structure);
the output at lag 0 is never a regressor. Lags count accepted samples of the
channel: a refused sample does not advance them.

Two evaluators share one arithmetic (powers by repeated multiplication, products
left to right), so they agree bit for bit:

* :meth:`RegressorSpec.block` builds the whole ``Z`` of a history at once;
* :class:`RegressorBuilder` builds one row at a time from its own lag buffers.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np
from numpy.typing import NDArray

__all__ = ["BuilderState", "Factor", "NotUsable", "RegressorBuilder", "RegressorSpec", "Term", "parse_term"]

OUTPUT_NAME = "y"
_FACTOR = re.compile(r"^(?P<name>[A-Za-z_][A-Za-z0-9_.]*)(?:\[-(?P<lag>\d+)\])?(?:\^(?P<power>\d+))?$")


@dataclass(frozen=True)
class Factor:
    """One factor of a term: ``name`` (an input, or ``y`` for the output), ``lag`` >= 0, ``power`` >= 1."""

    name: str
    lag: int
    power: int

    @property
    def is_output(self) -> bool:
        return self.name == OUTPUT_NAME


@dataclass(frozen=True)
class Term:
    """A parsed term; no factors means the constant ``1``."""

    text: str
    factors: tuple[Factor, ...]


class NotUsable(Exception):
    """A sample whose regressor cannot be formed (yet).

    Attributes
    ----------
    reason : str
        ``missing_input`` (state untouched) or ``lags_not_filled`` (the sample
        still fills the lag buffers).
    """

    def __init__(self, reason: str, message: str) -> None:
        super().__init__(message)
        self.reason = reason


def parse_term(text: str) -> Term:
    """Parse one term of the grammar in the module docstring.

    Raises
    ------
    ValueError
        Naming the term and what is wrong with it.
    """
    if not isinstance(text, str):
        raise ValueError(f"term must be a string, got {text!r}")
    compact = "".join(text.split())
    if compact == "1":
        return Term(text=compact, factors=())
    if not compact:
        raise ValueError("term is empty")
    factors = []
    for part in compact.split("*"):
        match = _FACTOR.match(part)
        if match is None:
            raise ValueError(
                f"term {text!r}: cannot read factor {part!r}; expected name, name^k, "
                f"name[-k] or y[-k] (k a positive integer)")
        lag = int(match["lag"]) if match["lag"] is not None else 0
        power = int(match["power"]) if match["power"] is not None else 1
        if match["lag"] is not None and lag < 1:
            raise ValueError(f"term {text!r}: lag must be >= 1, got {lag}")
        if power < 1:
            raise ValueError(f"term {text!r}: power must be >= 1, got {power}")
        if match["name"] == OUTPUT_NAME and lag == 0:
            raise ValueError(f"term {text!r}: the output y can only appear lagged, as y[-k]")
        factors.append(Factor(match["name"], lag, power))
    return Term(text=compact, factors=tuple(factors))


def _monomial(term: Term) -> tuple[tuple[str, int, int], ...]:
    """Canonical form of a term: sorted (name, lag, total power), so u*u == u^2 and a*b == b*a."""
    powers: dict[tuple[str, int], int] = {}
    for f in term.factors:
        powers[f.name, f.lag] = powers.get((f.name, f.lag), 0) + f.power
    return tuple(sorted((name, lag, power) for (name, lag), power in powers.items()))


class RegressorSpec:
    """A parsed term list.

    Parameters
    ----------
    terms : sequence of str
        At least one term, no duplicates.
    """

    def __init__(self, terms: Sequence[str]) -> None:
        if isinstance(terms, str) or len(terms) == 0:
            raise ValueError(f"terms must be a non-empty list of strings, got {terms!r}")
        parsed = [parse_term(t) for t in terms]
        seen: dict[tuple[tuple[str, int, int], ...], str] = {}
        for term in parsed:
            key = _monomial(term)
            if key in seen:
                raise ValueError(f"terms: {term.text!r} is the same regressor as {seen[key]!r}")
            seen[key] = term.text
        self.terms: tuple[Term, ...] = tuple(parsed)
        factors = [f for t in parsed for f in t.factors]
        self.input_names: tuple[str, ...] = tuple(sorted({f.name for f in factors if not f.is_output}))
        self.input_lags: dict[str, int] = {}
        for f in factors:
            if not f.is_output:
                self.input_lags[f.name] = max(self.input_lags.get(f.name, 0), f.lag)
        self.output_lag: int = max((f.lag for f in factors if f.is_output), default=0)
        self.warmup: int = max([self.output_lag, *self.input_lags.values()], default=0)

    @property
    def names(self) -> list[str]:
        """Canonical term texts, the parameter names."""
        return [t.text for t in self.terms]

    @property
    def n_params(self) -> int:
        return len(self.terms)

    def block(self, inputs: Mapping[str, NDArray[np.float64]], y: NDArray[np.float64]
              ) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
        """Regressor matrix of a whole history of accepted samples.

        Parameters
        ----------
        inputs : mapping of name to ndarray, shape (N,)
            Every name in :attr:`input_names`.
        y : ndarray, shape (N,)

        Returns
        -------
        Z : ndarray, shape (N, n)
            Rows before :attr:`warmup` hold zeros for lagged factors.
        usable : ndarray of bool, shape (N,)
            False for the first :attr:`warmup` rows (lags not filled).
        """
        y = np.asarray(y, dtype=np.float64)
        count = y.shape[0]
        missing = [name for name in self.input_names if name not in inputs]
        if missing:
            raise ValueError(f"inputs missing: {', '.join(missing)}")
        Z = np.empty((count, self.n_params))
        for col, term in enumerate(self.terms):
            value = np.ones(count)
            for k, factor in enumerate(term.factors):
                source = y if factor.is_output else np.asarray(inputs[factor.name], dtype=np.float64)
                shifted = np.zeros(count)
                shifted[factor.lag:] = source[: count - factor.lag]
                powered = shifted
                for _ in range(factor.power - 1):
                    powered = powered * shifted
                value = powered if k == 0 else value * powered
            Z[:, col] = value
        usable = np.arange(count) >= self.warmup
        return Z, usable


@dataclass(frozen=True, slots=True)      # slots: one per channel at every checkpoint
class BuilderState:
    """Copy of a :class:`RegressorBuilder`'s count and lag buffers (oldest value first).

    ``outputs`` holds the last ``max(output_lag, 1)`` outputs, ``inputs`` the last ``lag`` values of each
    lagged input. ``keeps_history`` is the builder's :attr:`RegressorBuilder.keeps_history`: without it
    the state is a count and the last output.
    """

    accepted: int
    outputs: tuple[float, ...]
    inputs: Mapping[str, tuple[float, ...]]
    keeps_history: bool


_NO_LAGGED_INPUTS: Mapping[str, list[float]] = MappingProxyType({})


def _keep_last(buffer: list[float], values: Sequence[float], size: int) -> None:
    """Append ``values`` and keep the last ``size`` (what a deque of that maxlen keeps; a list is a tenth of
    its memory, and a service holds one builder per channel)."""
    buffer.extend(values)
    if len(buffer) > size:
        del buffer[: len(buffer) - size]


class RegressorBuilder:
    """Streaming regressor rows for one channel, with the channel's lag buffers.

    Use :meth:`row` to form ``z_k`` for a sample, then :meth:`push` once the
    sample is accepted (also when its row was not usable because lags were
    still filling).
    """

    __slots__ = ("_accepted", "_inputs", "_output_size", "_outputs", "spec")

    def __init__(self, spec: RegressorSpec) -> None:
        self.spec = spec
        lagged = {name: lag for name, lag in spec.input_lags.items() if lag > 0}
        self._inputs: Mapping[str, list[float]] = {name: [] for name in lagged} if lagged else _NO_LAGGED_INPUTS
        self._output_size = max(spec.output_lag, 1)
        self._outputs: list[float] = []
        self._accepted = 0

    def check(self, inputs: Mapping[str, float]) -> None:
        """Raise :class:`NotUsable` ``missing_input`` if a needed input is absent."""
        for name in self.spec.input_names:
            if name not in inputs:
                raise NotUsable("missing_input", f"input {name!r} missing")

    def row(self, inputs: Mapping[str, float]) -> list[float]:
        """The regressor ``z_k`` for a sample with these current inputs.

        Raises
        ------
        NotUsable
            ``missing_input`` when an input is absent; ``lags_not_filled``
            while fewer than :attr:`RegressorSpec.warmup` samples were accepted.
        """
        self.check(inputs)
        if self._accepted < self.spec.warmup:
            raise NotUsable("lags_not_filled",
                            f"{self._accepted} of {self.spec.warmup} samples needed for lags")
        z = []
        for term in self.spec.terms:
            value = 1.0
            for k, factor in enumerate(term.factors):
                x = self._value(factor, inputs)
                powered = x
                for _ in range(factor.power - 1):
                    powered = powered * x
                value = powered if k == 0 else value * powered
            z.append(value)
        return z

    def _value(self, factor: Factor, inputs: Mapping[str, float]) -> float:
        if factor.is_output:
            return self._outputs[-factor.lag]
        if factor.lag == 0:
            return float(inputs[factor.name])
        return self._inputs[factor.name][-factor.lag]

    def push(self, inputs: Mapping[str, float], y: float) -> None:
        """Record an accepted sample in the lag buffers."""
        lags = self.spec.input_lags
        for name, buffer in self._inputs.items():
            buffer.append(float(inputs[name]))
            if len(buffer) > lags[name]:
                del buffer[0]
        outputs = self._outputs
        outputs.append(float(y))
        if len(outputs) > self._output_size:
            del outputs[0]
        self._accepted += 1

    @property
    def lagged_inputs(self) -> tuple[str, ...]:
        """Inputs whose past values the buffers keep."""
        return tuple(self._inputs)

    @property
    def keeps_history(self) -> bool:
        """Whether rows depend on past samples beyond the last output (lags of inputs or y[-2] and older)."""
        return bool(self._inputs) or self.spec.output_lag > 1

    def push_count(self, count: int, last_output: float) -> None:
        """:meth:`push_many` for a builder that does not :attr:`keeps_history`: only the last output is kept."""
        if self.keeps_history:
            raise ValueError("push_count needs a builder without lag history; use push_many")
        _keep_last(self._outputs, (float(last_output),), self._output_size)
        self._accepted += count

    @property
    def accepted(self) -> int:
        """Samples pushed so far."""
        return self._accepted

    def rows(self, inputs: Mapping[str, NDArray[np.float64]], y: NDArray[np.float64]
             ) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
        """Regressor rows of the next L samples at once, as if each were accepted in turn.

        Parameters
        ----------
        inputs : mapping of name to ndarray, shape (L,)
            Every name in the spec's ``input_names``.
        y : ndarray, shape (L,)

        Returns
        -------
        Z : ndarray, shape (L, n)
            Row i is what :meth:`row` gives for sample i after samples 0..i-1 were
            pushed (same arithmetic, same bits); zeros in lagged factors where
            ``usable`` is False.
        usable : ndarray of bool, shape (L,)
            False while the lags are not filled.
        """
        lag = self.spec.warmup
        if lag == 0:
            Z, usable = self.spec.block(inputs, y)
            return Z, usable
        # Prefix the history in the lag buffers; a value the buffers do not hold is never read.
        count = y.shape[0]
        extended = {}
        for name in self.spec.input_names:
            held = list(self._inputs.get(name, ()))[-lag:]
            extended[name] = np.concatenate([np.zeros(lag - len(held)), held, inputs[name]])
        held_y = list(self._outputs)[-lag:]
        Z, _ = self.spec.block(extended, np.concatenate([np.zeros(lag - len(held_y)), held_y, y]))
        usable = np.arange(count) >= lag - self._accepted
        return Z[lag:], usable

    def push_many(self, inputs: Mapping[str, NDArray[np.float64]], y: NDArray[np.float64]) -> None:
        """:meth:`push` for each of L accepted samples, in order (arrays of shape (L,))."""
        lags = self.spec.input_lags
        for name, buffer in self._inputs.items():
            _keep_last(buffer, inputs[name][-lags[name]:].tolist(), lags[name])
        _keep_last(self._outputs, y[-self._output_size:].tolist(), self._output_size)
        self._accepted += y.shape[0]

    def clear(self) -> None:
        """Empty the lag buffers (a restart: lags fill again)."""
        for buffer in self._inputs.values():
            buffer.clear()
        self._outputs.clear()
        self._accepted = 0

    @property
    def last_output(self) -> float | None:
        """The last output pushed (None before the first)."""
        return self._outputs[-1] if self._outputs else None

    def state(self) -> BuilderState:
        """Copy of the count and the lag buffers; see :class:`BuilderState`."""
        inputs = {name: tuple(buf) for name, buf in self._inputs.items()} if self._inputs else {}
        return BuilderState(self._accepted, tuple(self._outputs), inputs, self.keeps_history)

    def restore(self, state: BuilderState) -> None:
        """Take back a :meth:`state` of a builder with the same lags; ``state()`` then equals it.

        Raises
        ------
        ValueError
            A state with or without lag history where this builder has the other, or with other lagged
            inputs; nothing is changed then.
        """
        if state.keeps_history != self.keeps_history or set(state.inputs) != set(self._inputs):
            raise ValueError(f"state of a builder with lagged inputs {sorted(state.inputs)} and history "
                             f"{state.keeps_history}; this one has {sorted(self._inputs)} and {self.keeps_history}")
        self._accepted = int(state.accepted)
        self._outputs.clear()
        _keep_last(self._outputs, state.outputs, self._output_size)
        lags = self.spec.input_lags
        for name, values in state.inputs.items():
            self._inputs[name].clear()
            _keep_last(self._inputs[name], values, lags[name])
