"""Givens-rotation kernels of the square-root information update.

Two implementations of the same arithmetic: a vectorised one over B channels
(structure-of-arrays factor ``(n+1, n+1, B)``, preallocated buffers, no
temporaries in the loop) and a scalar one on Python floats for one channel.
Both perform the same IEEE operations in the same order, so they produce the
same bits; ``tests/unit/test_rwls.py`` holds them to that.

Rotation i folds row x into row i of ``sl * A`` and zeroes ``x[i]``::

    a = sl A[i, i] >= 0,  b = x[i],  r = hypot(a, b) = h sqrt(1 + (l / h)^2)
    c = a / r,  s = b / r                  (c = 0, s = 1 when r == 0: a row swap)
    A[i, j] <- (c sl) A[i, j] + s x[j]     j > i
    x[j]    <- c x[j] - (s sl) A[i, j]
    A[i, i] <- r

with ``h = max(a, |b|)``, ``l = min(a, |b|)``: the overflow- and underflow-safe
hypot of LAPACK's dlapy2. Measured on the NIST StRD files it also keeps about
one more digit than ``sqrt(a a + b b)`` on Norris and Pontius (file order).

Rounding residues. Where ``A[i, i] == 0`` (direction i never excited) and the
new row lies in the span of rows ``0..i-1``, exact arithmetic leaves ``x[i] = 0``
after rotations ``0..i-1``; floating point leaves what the cancellation in
``x[i] <- c x[i] - s sl A[k, i]`` did not cancel. Rotated in, that residue
would become ``R_ii`` and carry the row's residual into ``q_i``, so that
``theta_i = q_i / R_ii`` ~ 1e12 (see rwls.py). Only where ``a == 0``, an
``|x[i]| <= RESIDUE_TOLERANCE * max_k<i |A[k, i]|`` is set to 0 (the rows above,
already updated, hold the column's norm: the rotations preserve it). Measured:
residues reach 13 eps of that maximum (2.4 million of them: 1 to 10 exactly
collinear columns, lambda 0.9 to 1, runs of up to 20,000 rows, weights over
e^+-3); the smallest genuine value on the NIST StRD files is 2,780 eps (Filip's
start). The tolerance, ``2^-45 = 128 eps``, lies between, a power of two so both
kernels get it exactly.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

RESIDUE_TOLERANCE = 2.0 ** -45
"""Below this fraction of its column, an ``x[i]`` meeting ``A[i, i] == 0`` is rounding (module docstring)."""


class Workspace:
    """Preallocated buffers for batches of up to ``capacity`` channels."""

    def __init__(self, n_params: int, capacity: int) -> None:
        m = n_params + 1
        self.capacity = capacity
        self.row = np.empty((m, capacity))
        self.wide1 = np.empty((m, capacity))
        self.wide2 = np.empty((m, capacity))
        self.theta = np.empty((n_params, capacity))
        # One value per channel of the batch (see the kernels below for what each holds).
        self.a: FloatArray = np.empty(capacity)
        self.r: FloatArray = np.empty(capacity)
        self.t: FloatArray = np.empty(capacity)
        self.c: FloatArray = np.empty(capacity)
        self.s: FloatArray = np.empty(capacity)
        self.csl: FloatArray = np.empty(capacity)
        self.ssl: FloatArray = np.empty(capacity)
        self.cos_product: FloatArray = np.empty(capacity)
        self.h: FloatArray = np.empty(capacity)
        self.l: FloatArray = np.empty(capacity)
        self.empty = np.empty(capacity, dtype=bool)
        self.flush = np.empty(capacity, dtype=bool)
        self._views: dict[int, Workspace] = {}

    def view(self, b: int) -> Workspace:
        """Buffers trimmed to ``b`` channels (views, no copies; made once per size)."""
        if b > self.capacity:
            raise ValueError(f"batch of {b} exceeds workspace capacity {self.capacity}")
        if b == self.capacity:
            return self
        trimmed = self._views.get(b)
        if trimmed is None:
            trimmed = object.__new__(Workspace)
            trimmed.capacity = b
            trimmed._views = {}
            for key, value in self.__dict__.items():
                if isinstance(value, np.ndarray):
                    setattr(trimmed, key, value[..., :b])
            self._views[b] = trimmed
        return trimmed


def rotate_rows(A: FloatArray, x: FloatArray, sl: FloatArray | None, ws: Workspace,
                first: int = 0, skip_before: NDArray[np.int64] | None = None) -> FloatArray:
    """Rotate x, shape (n+1, B), into rows ``first..n-1`` of ``sl * A`` in place.

    Parameters
    ----------
    A : ndarray, shape (n+1, n+1, B)
        Augmented factor, modified in place (columns 0..n of rows 0..n-1).
    x : ndarray, shape (n+1, B)
        The new row; on return ``x[n]`` holds the rotated right-hand side.
    sl : ndarray, shape (B,), or None
        sqrt(forgetting factor) per channel; None means 1 (no scaling).
    first : int
        Rows before ``first`` are left alone (x is zero there).
    skip_before : ndarray of int, shape (B,), optional
        Per channel, rows ``i < skip_before`` are identities (x is zero there).

    Returns
    -------
    ndarray, shape (B,)
        Product of the cosines (a view into the workspace).
    """
    n = A.shape[0] - 1
    cp = ws.cos_product
    cp.fill(1.0)
    r, t, c, s = ws.r, ws.t, ws.c, ws.s
    for i in range(first, n):
        if sl is None:
            a = A[i, i]          # a view is safe: A[i, i] is only overwritten at the end
        else:
            a = ws.a
            np.multiply(sl, A[i, i], out=a)
        b = x[i]
        h, low = ws.h, ws.l
        np.abs(b, out=t)
        np.maximum(a, t, out=h)
        np.minimum(a, t, out=low)
        np.equal(low, 0.0, out=ws.empty)      # a == 0 or b == 0: rare once a channel is identifiable
        any_empty = bool(ws.empty.any())
        if any_empty:
            if i > 0 and _flush_residues(A, i, a, b, t, ws):
                np.maximum(a, t, out=h)
                np.minimum(a, t, out=low)
            np.equal(h, 0.0, out=ws.empty)
            any_empty = bool(ws.empty.any())  # h == 0 exactly when r == 0 (both inputs zero)
        if any_empty:
            np.divide(low, np.where(ws.empty, 1.0, h), out=low)
        else:
            np.divide(low, h, out=low)
        np.multiply(low, low, out=r)
        np.add(r, 1.0, out=r)
        np.sqrt(r, out=r)
        np.multiply(h, r, out=r)           # r = h sqrt(1 + (l / h)^2)
        if any_empty:
            np.divide(a, np.where(ws.empty, 1.0, r), out=c)
            np.divide(b, np.where(ws.empty, 1.0, r), out=s)
            c[ws.empty] = 0.0
            s[ws.empty] = 1.0
        else:
            np.divide(a, r, out=c)
            np.divide(b, r, out=s)
        if skip_before is not None:
            identity = i < skip_before
            c[identity] = 1.0
            s[identity] = 0.0
            r[identity] = A[i, i][identity]
        if sl is None:
            csl, ssl = c, s
        else:
            csl, ssl = ws.csl, ws.ssl
            np.multiply(c, sl, out=csl)
            np.multiply(s, sl, out=ssl)
        m = n - i
        Ai = A[i, i + 1:]
        xi = x[i + 1:]
        old = ws.wide1[:m]
        tmp = ws.wide2[:m]
        np.multiply(Ai, ssl, out=old)      # (s sl) A[i, j], from the old row
        np.multiply(Ai, csl, out=Ai)
        np.multiply(xi, s, out=tmp)
        np.add(Ai, tmp, out=Ai)            # (c sl) A[i, j] + s x[j]
        np.multiply(xi, c, out=xi)
        np.subtract(xi, old, out=xi)       # c x[j] - (s sl) A[i, j]
        A[i, i] = r
        np.multiply(cp, c, out=cp)
    return cp


def _flush_residues(A: FloatArray, i: int, a: FloatArray, b: FloatArray, t: FloatArray,
                    ws: Workspace) -> bool:
    """Set ``b = x[i]`` and ``t = |b|`` to 0 where ``a == 0`` and ``|b|`` is a rounding residue; True if any."""
    flush = ws.flush
    np.equal(a, 0.0, out=flush)
    np.logical_and(flush, t > 0.0, out=flush)
    if not flush.any():
        return False
    scale = np.abs(A[:i, i]).max(axis=0)            # exact, as the scalar twin's comparisons
    np.logical_and(flush, t <= RESIDUE_TOLERANCE * scale, out=flush)
    if not flush.any():
        return False
    b[flush] = 0.0
    t[flush] = 0.0
    return True


def rotate_rows_scalar(A: list[list[float]], x: list[float], sl: float | None,
                       first: int = 0) -> float:
    """Scalar twin of :func:`rotate_rows` for one channel (lists, in place).

    Runs a straight-line function generated once per ``(n, first, scaled)``:
    the same operations as the loop in :func:`_rotation_source`, without the
    interpreter's loop and indexing overhead (about 2x faster at n = 4).
    """
    key = (len(x) - 1, first, sl is not None)
    kernel = _KERNELS.get(key)
    if kernel is None:
        kernel = _KERNELS[key] = _compile_rotation(*key)
    return kernel(A, x, 1.0 if sl is None else sl)


_KERNELS: dict[tuple[int, int, bool], Callable[[list[list[float]], list[float], float], float]] = {}


def _rotation_source(n: int, first: int, scaled: bool) -> str:
    """Python source of the unrolled rotation of x into rows ``first..n-1`` of A.

    Per row i, exactly the arithmetic of :func:`rotate_rows` (the ``h``/``l``
    hypot, the swap when ``r == 0``, ``c sl`` and ``s sl`` factors), on locals.
    """
    lines = ["def rotate(A, x, sl):", f"    {', '.join(f'x{j}' for j in range(n + 1))}, = x",
             "    cp = 1.0"]
    for i in range(first, n):
        lines += [
            f"    Ai = A[{i}]",
            f"    a = {'sl * Ai[' + str(i) + ']' if scaled else 'Ai[' + str(i) + ']'}",
            f"    b = x{i}",
            "    ba = abs(b)",
            *_residue_source(i),
            "    h = a if a > ba else ba",
            "    if h == 0.0:",
            "        r = 0.0",
            "    else:",
            "        q = (ba if a > ba else a) / h",
            "        r = h * sqrt(1.0 + q * q)",
            "    if r == 0.0:",
            "        c = 0.0",
            "        s = 1.0",
            "    else:",
            "        c = a / r",
            "        s = b / r",
        ]
        lines += ["    csl = c * sl", "    ssl = s * sl"] if scaled else ["    csl = c", "    ssl = s"]
        for j in range(i + 1, n + 1):
            lines += [f"    aij = Ai[{j}]",
                      f"    Ai[{j}] = csl * aij + s * x{j}",
                      f"    x{j} = c * x{j} - ssl * aij"]
        lines += [f"    Ai[{i}] = r", "    cp = cp * c"]
    lines += [f"    x[{j}] = x{j}" for j in range(first, n + 1)]
    lines.append("    return cp")
    return "\n".join(lines) + "\n"


def _residue_source(i: int) -> list[str]:
    """Source of the residue test of :func:`rotate_rows` at row i (nothing at row 0: no rows above)."""
    if i == 0:
        return []
    lines = ["    if a == 0.0 and ba > 0.0:", f"        m = abs(A[0][{i}])"]
    for k in range(1, i):
        lines += [f"        v = abs(A[{k}][{i}])", "        m = m if m >= v else v"]
    return [*lines, "        if ba <= RESIDUE_TOLERANCE * m:", "            b = 0.0", "            ba = 0.0",
            f"            x{i} = 0.0"]


def _compile_rotation(n: int, first: int, scaled: bool
                      ) -> Callable[[list[list[float]], list[float], float], float]:
    namespace: dict[str, object] = {"sqrt": math.sqrt, "RESIDUE_TOLERANCE": RESIDUE_TOLERANCE}
    exec(compile(_rotation_source(n, first, scaled), f"<rotation n={n} first={first}>", "exec"), namespace)
    return namespace["rotate"]  # type: ignore[return-value]


def back_substitute(A: FloatArray, ws: Workspace, stop: int = 0) -> FloatArray:
    """theta = R^-1 q per channel, shape (n, B); theta_i = 0 where R_ii == 0.

    Only rows ``stop..n-1`` are solved (the others are left undefined).
    Sums run left to right over the leading axis, as in the scalar twin.
    """
    n = A.shape[0] - 1
    theta = ws.theta
    acc = ws.t
    for i in range(n - 1, stop - 1, -1):
        np.copyto(acc, A[i, n])
        if i < n - 1:
            dot = ws.r
            np.multiply(A[i, i + 1], theta[i + 1], out=dot)
            for j in range(i + 2, n):
                np.add(dot, A[i, j] * theta[j], out=dot)
            np.subtract(acc, dot, out=acc)
        d = A[i, i]
        zero = d == 0.0
        if zero.any():
            np.divide(acc, np.where(zero, 1.0, d), out=theta[i])
            theta[i][zero] = 0.0
        else:
            np.divide(acc, d, out=theta[i])
    return theta


def back_substitute_scalar(A: list[list[float]], n: int) -> list[float]:
    """Scalar twin of :func:`back_substitute`."""
    theta = [0.0] * n
    for i in range(n - 1, -1, -1):
        Ai = A[i]
        acc = Ai[n]
        if i < n - 1:
            dot = Ai[i + 1] * theta[i + 1]
            for j in range(i + 2, n):
                dot = dot + Ai[j] * theta[j]
            acc = acc - dot
        d = Ai[i]
        theta[i] = acc / d if d != 0.0 else 0.0
    return theta


def covariance_diagonal(A: FloatArray, j: NDArray[np.int64], first: int, ws: Workspace) -> FloatArray:
    """``P_jj = ||R^-T e_j||^2`` per channel by forward substitution, shape (B,).

    ``j`` may differ between channels; rows before ``first`` (<= min j) are
    skipped since ``v`` is zero there. Needs ``R_ii > 0`` for ``i >= first``;
    channels where that fails get inf or NaN, which callers mask out.
    """
    n = A.shape[0] - 1
    v = ws.theta
    acc = ws.t
    with np.errstate(divide="ignore", invalid="ignore"):
        for i in range(first, n):
            np.equal(j, i, out=ws.empty)
            acc[...] = ws.empty                # e_j, component i
            for row in range(first, i):
                np.subtract(acc, A[row, i] * v[row], out=acc)
            np.divide(acc, A[i, i], out=v[i])
        total = ws.r
        np.multiply(v[first], v[first], out=total)
        for i in range(first + 1, n):
            np.add(total, v[i] * v[i], out=total)
    return total


def covariance_diagonal_scalar(A: list[list[float]], j: int, n: int) -> float:
    """Scalar twin of :func:`covariance_diagonal` (R_ii > 0 for i >= j required)."""
    v = [0.0] * n
    for i in range(j, n):
        acc = 1.0 if i == j else 0.0
        for row in range(j, i):
            acc = acc - A[row][i] * v[row]
        v[i] = acc / A[i][i]
    total = v[j] * v[j]
    for i in range(j + 1, n):
        total = total + v[i] * v[i]
    return total


def scalar_step(A: list[list[float]], zs: list[float], y: float, weight: float, sl: float, count: int,
                limit: list[float] | None, inv_limit: list[float] | None,
                forgotten: float) -> tuple[float, float]:
    """One recursive update of one channel's augmented factor (lists, in place).

    The scalar twin of ``RecursiveWLSBank.update`` (see :mod:`estimator.recursive.rwls`):
    data row, residual-sum-of-squares element, covariance bound on parameter
    ``count % n``. ``limit`` is None when no bound applies; ``forgotten`` is the
    channel's ``f = 2 (lambda^-n - 1)`` that places the bound's pseudo-observation.
    Returns ``(innovation, leverage)``.
    """
    n = len(zs)
    sw = math.sqrt(weight)
    x = [v * sw for v in zs]
    x.append(y * sw)
    cos_product = rotate_rows_scalar(A, x, sl)
    alpha = x[n]
    rho = sl * A[n][n]
    A[n][n] = math.sqrt(rho * rho + alpha * alpha)
    if limit is not None and inv_limit is not None and all(A[i][i] > 0.0 for i in range(n)):
        j = count % n
        p_jj = covariance_diagonal_scalar(A, j, n)
        if p_jj > limit[j]:
            amp = math.sqrt(inv_limit[j] - 1.0 / p_jj)
            theta = back_substitute_scalar(A, n)
            excess = p_jj * inv_limit[j] - 1.0
            held = theta[j]
            anchor = held * (forgotten / excess) if excess > forgotten else held
            pseudo_row = [0.0] * (n + 1)
            pseudo_row[j] = amp
            pseudo_row[n] = amp * anchor
            rotate_rows_scalar(A, pseudo_row, None, first=j)
    if cos_product > 0.0:
        gamma = cos_product * cos_product
        # gamma underflows to 0 for a row far outside the data seen so far: leverage beyond any float.
        return alpha / (sw * cos_product), (sl * sl * (1.0 - gamma) / gamma if gamma > 0.0 else math.inf)
    return math.nan, math.inf
