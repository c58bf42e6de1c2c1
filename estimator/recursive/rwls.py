"""Recursive weighted least squares with exponential forgetting, square-root information form.

The estimator minimises, per channel,

    J_k(theta) = sum_i lambda^(k-i) w_i (y_i - z_i^T theta)^2

and keeps, instead of the covariance P, the upper-triangular factor of the
augmented information matrix of the sqrt(w)-scaled data ``[Z | y]``::

    A = [[R, q],        R^T R = H = sum lambda^(k-i) w_i z_i z_i^T   (information)
         [0, rho]]      R theta = q,  rho^2 = weighted residual sum of squares

A new sample is one more row ``sqrt(w) [z^T, y]``; Givens rotations fold it into
``sqrt(lambda) A`` (Bierman 1977, ch. V, square-root information filter; the
rotation form is the QR-RLS array of McWhirter 1983). Rotations are orthogonal,
so ``H = R^T R`` is symmetric positive semi-definite by construction and the
conditioning is that of the data, not its square as in covariance-form RLS.
With ``A = 0`` at the start (diffuse prior) and ``lambda = 1`` the factor is
exactly the R of a QR of the weighted data, so the recursive estimate equals
batch WLS up to rounding.

Unexcited directions stay unexcited. A row in the span of the rows so far
(the same regressor again) leaves ``R_ii = 0`` in exact arithmetic. In floating
point the rotations leave a residue ``~ eps |R_ki|`` (exact cancellation happens
only with ``lambda = 1`` and equal weights); rotated in, it became ``R_ii`` and
carried the row's residual into ``q_i``, so ``theta_i = q_i / R_ii ~ 1e12``, and
the anti-windup below then held that value. Such residues are set to 0 (test
and tolerance in ``_givens``): the channel stays not identifiable, with the basic
solution (``theta_i = 0``) and no anti-windup, until a sample excites direction
i, and from then on is the least-squares solution, as with ``lambda = 1``.

Anti-windup. With ``lambda < 1`` and no excitation the information decays as
``lambda^k`` and P grows without bound; when excitation returns, the huge gain
throws the estimate about. We bound the covariance, as the bounded-covariance
family does (Salgado, Goodwin & Middleton 1988), by the mechanism of stabilised
forgetting (Kulhavy & Zarrop 1993): information is added only where it is
missing, as a pseudo-observation of one parameter. Each update checks one
parameter j (cycling through them); if ``P_jj > covariance_limit_j`` it rotates
in the row ``sqrt(a) [e_j^T, m_j]`` with ``a = 1 / limit_j - 1 / P_jj``, which
sets ``P_jj`` to the limit exactly (rank-one update of ``H``); rho is left alone
(a prior, not data). Between checks ``P_jj`` grows at most by ``1 / lambda`` per
update, so once every j has been checked (n - 1 updates after the channel became
identifiable; before that an unchecked ``P_jj`` is whatever the first samples
give) ``P_jj <= covariance_limit_j / lambda^(n-1)`` between updates, and
``/ lambda^n`` inside one before its check; with z = 0 the bound is attained.
While the data keep every ``P_jj`` below its limit nothing is added and
the recursion is exactly exponentially weighted WLS (so ``rwls fit`` agrees with
it). The limit applies only when ``lambda < 1``: without forgetting P never grows.

Where the pseudo-observation sits. By the bound, forgetting alone takes
``excess = P_jj / limit_j - 1`` to at most ``lambda^-n - 1`` between two checks
of j. Up to ``f = 2 (lambda^-n - 1)`` (twice, so rounding at the attained bound
counts as forgetting) the missing information is what forgetting took from a
value known to the limit: it goes back at ``m_j = theta_j`` and the estimate
does not move (the hold). A larger excess means the data never determined
``theta_j`` to the limit: a start with too little excitation, where
``theta_j`` is noise over a tiny spread of the regressors (1e8 from a spread of
1e-10 is plain least squares). Holding that value made it information worth
``1 / limit``, which the data then took thousands of samples to outweigh. So
only the share ``f / P_jj`` of ``a`` is held and the rest, never there, comes
at the prior mean 0 (the diffuse start's estimate)::

    m_j = theta_j min(1, f / excess)

which takes ``theta_j`` to ``theta_j (1 + f) limit_j / P_jj`` where the other
parameters are known: ``P_jj`` is read as the data's variance, ``limit_j`` as the
prior's. An unexcited direction then carries the prior-anchored value, and
excitation takes over within a few samples (the prior weighs ``1 / limit``).
A limit below the start's ``P_jj`` thus acts as a prior at 0 while data are few.

Innovation for free. After the data row has been rotated through R, its
right-hand side entry is ``alpha = gamma^(1/2) sqrt(w) e`` with ``e`` the
a-priori residual and ``gamma = prod(cos)^2 = lambda / (lambda + w z^T P z)``
the conversion factor (Haykin, Adaptive Filter Theory, QR-RLS chapter), so the
innovation and its leverage come out of the rotation without solving for theta.

Layout: the bank stores ``A`` structure-of-arrays as ``(n+1, n+1, K)`` so that
one rotation acts on contiguous ``(m, K)`` slices for all channels at once.
``update_one`` is a scalar path for one channel that performs the same floating
point operations in the same order, so both paths give bit-identical states.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from estimator.recursive._givens import (
    Workspace,
    back_substitute,
    back_substitute_scalar,
    covariance_diagonal,
    rotate_rows,
    scalar_step,
)
from estimator.recursive.sample_refusal import SampleRefusal
from estimator.recursive.weight_rule import usable_weights, weight_is_usable

__all__ = ["BankState", "RecursiveWLSBank", "SampleRefused", "UpdateResult"]

FloatArray = NDArray[np.float64]


class SampleRefused(ValueError):
    """A sample the estimator refuses; the state is left untouched.

    Attributes
    ----------
    reason : SampleRefusal
        ``non_finite``, ``bad_weight``, ``bad_shape``, ``bad_channel`` or ``duplicate_channel``.
    """

    def __init__(self, reason: SampleRefusal, message: str) -> None:
        super().__init__(message)
        self.reason = reason


def checked_sample(z: Sequence[float], y: float, weight: float, n: int) -> tuple[list[float], float, float]:
    """One sample as floats, or :class:`SampleRefused` (``bad_shape``, ``non_finite``, ``bad_weight``)."""
    zs = [float(v) for v in z]
    y = float(y)
    weight = float(weight)
    if len(zs) != n:
        raise SampleRefused(SampleRefusal.BAD_SHAPE, f"z must have length {n}, got {len(zs)}")
    if not (all(math.isfinite(v) for v in zs) and math.isfinite(y)):
        raise SampleRefused(SampleRefusal.NON_FINITE, "z and y must be finite")
    if not weight_is_usable(weight):
        raise SampleRefused(SampleRefusal.BAD_WEIGHT, f"weight must be finite and > 0, got {weight}")
    return zs, y, weight


@dataclass(frozen=True)
class UpdateResult:
    """Per-sample by-products of one update (arrays of shape ``(B,)``).

    Attributes
    ----------
    innovation : a-priori residual ``e = y - z^T theta_{k-1}`` (NaN while the
        parameters were not yet identifiable).
    leverage : ``w z^T P_{k-1} z`` (inf while not identifiable).
    weight : the weight ``w`` the sample was applied with.
    """

    innovation: FloatArray
    leverage: FloatArray
    weight: FloatArray


@dataclass(frozen=True)
class BankState:
    """Copy of every array of a bank; enough to rebuild it exactly.

    ``factor`` has shape ``(K, n+1, n+1)`` (channel first, for readers);
    the other arrays have shape ``(K,)`` or ``(K, n)``.
    """

    factor: FloatArray
    forgetting_factor: FloatArray
    covariance_limit: FloatArray
    effective_count: FloatArray
    effective_count_sq: FloatArray
    sample_count: NDArray[np.int64]


def _as_channel_vector(value: ArrayLike, n_channels: int, name: str) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        arr = np.full(n_channels, float(arr))
    if arr.shape != (n_channels,):
        raise ValueError(f"{name} must be a scalar or shape ({n_channels},), got {arr.shape}")
    return arr.copy()


class RecursiveWLSBank:
    """K channels with the same number of parameters n, updated in one vectorised step.

    Parameters
    ----------
    n_channels : int
        K, number of channels in the bank.
    n_params : int
        n, parameters per channel.
    forgetting_factor : float or ndarray, shape (K,)
        lambda in (0, 1]; effective memory about ``1 / (1 - lambda)`` samples
        (common practice).
    covariance_limit : float or ndarray, shape (n,) or (K, n)
        Bound on the diagonal of the unscaled covariance P (units of
        ``parameter^2 * weight``) enforced when excitation vanishes (see the
        module docstring); ``inf`` disables it. No effect when
        ``forgetting_factor == 1``.
    """

    def __init__(
        self,
        n_channels: int,
        n_params: int,
        forgetting_factor: ArrayLike = 1.0,
        covariance_limit: ArrayLike = 1e6,
    ) -> None:
        if n_channels < 1:
            raise ValueError(f"n_channels must be >= 1, got {n_channels}")
        if n_params < 1:
            raise ValueError(f"n_params must be >= 1, got {n_params}")
        lam = _as_channel_vector(forgetting_factor, n_channels, "forgetting_factor")
        if not np.all((lam > 0.0) & (lam <= 1.0)):
            bad = lam[~((lam > 0.0) & (lam <= 1.0))][0]
            raise ValueError(f"forgetting_factor must be in (0, 1], got {bad}")
        limit = np.asarray(covariance_limit, dtype=np.float64)
        if limit.shape not in ((), (n_params,), (n_channels, n_params)):
            raise ValueError(
                f"covariance_limit must be a scalar, shape ({n_params},) or "
                f"({n_channels}, {n_params}), got {limit.shape}")
        limit = np.broadcast_to(limit, (n_channels, n_params))
        if not np.all(limit > 0.0):
            raise ValueError(f"covariance_limit must be > 0, got {limit.min()}")
        self.n_channels = n_channels
        self.n_params = n_params
        m = n_params + 1
        self._A: FloatArray = np.zeros((m, m, n_channels))
        self._sqrt_lambda: FloatArray = np.sqrt(lam)
        self._lambda: FloatArray = lam
        # The limit only applies with forgetting; inf disables it.
        limit = np.where(lam[:, None] < 1.0, limit, np.inf)
        self._limit: FloatArray = np.ascontiguousarray(limit.T)          # (n, K)
        self._inv_limit: FloatArray = 1.0 / self._limit
        self._has_limit = np.any(np.isfinite(self._limit), axis=0)
        self._forgotten_excess: FloatArray = forgotten_excess(lam, n_params)
        self._all_unit_lambda = bool(np.all(lam == 1.0))
        self._workspace = Workspace(n_params, n_channels)
        self._all_channels = np.arange(n_channels)
        self._n_eff: FloatArray = np.zeros(n_channels)
        self._n_eff_sq: FloatArray = np.zeros(n_channels)
        self._count: NDArray[np.int64] = np.zeros(n_channels, dtype=np.int64)

    # ------------------------------------------------------------------ checks
    def _check_batch(self, z: FloatArray, y: FloatArray, w: FloatArray,
                     channels: NDArray[np.intp] | None) -> None:
        b = y.shape[0] if y.ndim == 1 else -1
        if z.shape != (b, self.n_params) or y.shape != (b,) or w.shape != (b,):
            raise SampleRefused(
                SampleRefusal.BAD_SHAPE,
                f"z must be (B, {self.n_params}) and y, weight (B,); got "
                f"{z.shape}, {y.shape}, {w.shape}")
        if channels is not None:
            if channels.shape != (b,):
                raise SampleRefused(SampleRefusal.BAD_SHAPE, f"channels must have shape ({b},), got {channels.shape}")
            if b and (channels.min() < 0 or channels.max() >= self.n_channels):
                raise SampleRefused(SampleRefusal.BAD_CHANNEL,
                                     f"channel index out of range 0..{self.n_channels - 1}")
            seen = np.zeros(self.n_channels, dtype=bool)
            seen[channels] = True
            if np.count_nonzero(seen) != b:
                raise SampleRefused(SampleRefusal.DUPLICATE_CHANNEL,
                                     "a channel may appear once per vectorised step; apply in order")
        elif b != self.n_channels:
            raise SampleRefused(SampleRefusal.BAD_SHAPE,
                                f"without channels, B must equal K = {self.n_channels}, got {b}")
        # A sum of finite numbers is finite unless it overflows, and NaN or inf
        # propagate into it: one pass decides the common case, the full scan
        # only runs when the sum is not finite.
        if not (math.isfinite(float(z.sum()) + float(y.sum()))
                or (np.isfinite(z).all() and np.isfinite(y).all())):
            raise SampleRefused(SampleRefusal.NON_FINITE, "z and y must be finite")
        if not usable_weights(w).all():
            raise SampleRefused(SampleRefusal.BAD_WEIGHT, "weight must be finite and > 0")

    # ---------------------------------------------------------------- updates
    def update(
        self,
        z: ArrayLike,
        y: ArrayLike,
        weight: ArrayLike | None = None,
        channels: ArrayLike | None = None,
    ) -> UpdateResult:
        """Apply one sample to each of B distinct channels in one vectorised step.

        Parameters
        ----------
        z : array_like, shape (B, n)
            Regressor rows.
        y : array_like, shape (B,)
            Outputs.
        weight : array_like, shape (B,), optional
            Positive weights w (``1 / sigma^2`` for BLUE); default 1.
        channels : array_like of int, shape (B,), optional
            Channel indices, each at most once; default ``arange(K)``.

        Returns
        -------
        UpdateResult

        Raises
        ------
        SampleRefused
            Any row non-finite, a weight not positive, shapes or channel
            indices wrong. Nothing is applied then.
        """
        zz = np.asarray(z, dtype=np.float64)
        yy = np.asarray(y, dtype=np.float64)
        ww = np.ones_like(yy) if weight is None else np.asarray(weight, dtype=np.float64)
        full = channels is None
        given = None if full else np.asarray(channels)
        if given is not None:
            if given.dtype.kind not in "iu":
                raise SampleRefused(SampleRefusal.BAD_CHANNEL, f"channels must be integers, got dtype {given.dtype}")
            given = given.astype(np.intp, copy=False)
        self._check_batch(zz, yy, ww, given)
        return self._step(None if full else given, zz, yy, ww)

    def update_trusted(self, z: FloatArray, y: FloatArray, weight: FloatArray,
                       channels: NDArray[np.intp]) -> UpdateResult:
        """:meth:`update` without its checks, for a caller that made them for a whole micro-batch.

        The caller guarantees: float64 arrays ``z`` (B, n), ``y`` and ``weight`` (B,),
        every value finite, every weight > 0, ``channels`` distinct indices in range.
        Same arithmetic as :meth:`update`, so the same bits.
        """
        return self._step(channels, z, y, weight)

    def _step(self, given: NDArray[np.intp] | None, zz: FloatArray, yy: FloatArray,
              ww: FloatArray) -> UpdateResult:
        full = given is None
        idx = self._all_channels if given is None else given
        b = idx.shape[0]
        ws = self._workspace.view(b) if b <= self._workspace.capacity else Workspace(self.n_params, b)
        A = self._A if full else self._A[:, :, idx]
        sl = self._sqrt_lambda if full else self._sqrt_lambda[idx]
        n = self.n_params
        sw = np.sqrt(ww)
        row = ws.row
        np.multiply(zz.T, sw, out=row[:n])
        np.multiply(yy, sw, out=row[n])
        cos_product = rotate_rows(A, row, None if self._all_unit_lambda else sl, ws).copy()
        alpha = row[n].copy()
        rho = A[n, n]                                   # rho'^2 = lambda rho^2 + alpha^2
        np.multiply(rho, sl, out=rho)
        np.multiply(rho, rho, out=rho)
        np.add(rho, row[n] * row[n], out=rho)
        np.sqrt(rho, out=rho)

        sel = slice(None) if full else idx     # a slice avoids fancy-index copies
        count = self._count[sel] + 1
        has_limit = self._has_limit if full else self._has_limit[idx]
        if has_limit.any():
            # Only identifiable channels (every R_ii > 0) are bounded; before that
            # the start stays diffuse.
            due = has_limit & (A[0, 0] > 0.0)
            for i in range(1, n):
                due &= A[i, i] > 0.0
            if due.any():
                self._bound_covariance(A, sel, count % n, due, ws)
        if not full:
            self._A[:, :, idx] = A
        lam = self._lambda[sel]
        self._n_eff[sel] = lam * self._n_eff[sel] + 1.0
        self._n_eff_sq[sel] = lam * lam * self._n_eff_sq[sel] + 1.0
        self._count[sel] = count
        return _innovation(alpha, cos_product, sw, ww, sl)

    def _bound_covariance(self, A: FloatArray, sel: slice | NDArray[np.intp], j: NDArray[np.int64],
                          due: NDArray[np.bool_], ws: Workspace) -> None:
        """Where ``P_jj`` exceeds its limit, rotate in ``sqrt(a) [e_j^T, m_j]`` (rho untouched; m_j: module docstring).

        ``sel`` selects the bank columns of this batch (a slice for the whole bank).
        """
        n = self.n_params
        b = j.shape[0]
        j0 = int(j[0])
        lockstep = bool((j == j0).all())      # the usual case: the whole bank updated together
        if lockstep:
            limit, inv_limit = self._limit[j0, sel], self._inv_limit[j0, sel]
            first = j0
        else:
            cols = np.arange(b)
            bank_cols = np.arange(self.n_channels)[sel]
            limit, inv_limit = self._limit[j, bank_cols], self._inv_limit[j, bank_cols]
            first = int(j[due].min())
        p_jj = covariance_diagonal(A, j, first, ws)
        over = due & (p_jj > limit)
        if not over.any():
            return
        every = bool(over.all())
        # Both from p_jj before back_substitute reuses its buffer; excess = P_jj / limit - 1.
        if every:
            amp = np.sqrt(inv_limit - 1.0 / p_jj)
            excess = p_jj * inv_limit - 1.0
        else:
            amp = np.zeros(b)
            amp[over] = np.sqrt(inv_limit[over] - 1.0 / p_jj[over])
            excess = p_jj[over] * inv_limit[over] - 1.0
        first = j0 if lockstep else int(j[over].min())
        theta = back_substitute(A, ws, stop=first)
        theta_j = theta[j0] if lockstep else theta[j, cols]
        forgotten = self._forgotten_excess[sel]
        if every:
            anchor = _anchor(excess, forgotten, theta_j)
        else:
            anchor = np.zeros(b)
            anchor[over] = _anchor(excess, forgotten[over], theta_j[over])
        x = ws.row
        x.fill(0.0)
        if lockstep:
            x[j0] = amp
        else:
            x[j, cols] = amp
        np.multiply(amp, anchor, out=x[n])
        if every and lockstep:
            rotate_rows(A, x, None, ws, first=first)
        else:
            rotate_rows(A, x, None, ws, skip_before=np.where(over, j, n))

    def update_one(self, channel: int, z: Sequence[float], y: float, weight: float = 1.0) -> tuple[float, float]:
        """Scalar path for one sample of one channel; bit-identical to :meth:`update`.

        Parameters
        ----------
        channel : int
        z : sequence of float, length n
        y, weight : float

        Returns
        -------
        (innovation, leverage) : tuple of float
            As in :class:`UpdateResult`.

        Raises
        ------
        SampleRefused
            As :meth:`update`; the state is untouched then.
        """
        if (isinstance(channel, bool) or not isinstance(channel, int | np.integer)
                or not 0 <= channel < self.n_channels):
            raise SampleRefused(SampleRefusal.BAD_CHANNEL,
                                f"channel must be in 0..{self.n_channels - 1}, got {channel!r}")
        zs, y, weight = checked_sample(z, y, weight, self.n_params)
        A = self._A[:, :, channel].tolist()
        count = int(self._count[channel]) + 1
        bounded = bool(self._has_limit[channel])
        result = scalar_step(A, zs, y, weight, float(self._sqrt_lambda[channel]), count,
                             self._limit[:, channel].tolist() if bounded else None,
                             self._inv_limit[:, channel].tolist() if bounded else None,
                             float(self._forgotten_excess[channel]))
        self._A[:, :, channel] = A
        lam = float(self._lambda[channel])
        self._n_eff[channel] = lam * float(self._n_eff[channel]) + 1.0
        self._n_eff_sq[channel] = lam * lam * float(self._n_eff_sq[channel]) + 1.0
        self._count[channel] = count
        return result

    def reset_channel(self, channel: int) -> None:
        """Forget everything channel ``channel`` has learned (a diffuse start again)."""
        self._A[:, :, channel] = 0.0
        self._n_eff[channel] = 0.0
        self._n_eff_sq[channel] = 0.0
        self._count[channel] = 0

    # ------------------------------------------------------------------ reads
    def state(self) -> BankState:
        """Copy of every array (channel-first factor); see :class:`BankState`."""
        return BankState(
            # .copy(), not ascontiguousarray: with K = 1 the moved view is already
            # contiguous and would be handed out uncopied, aliasing live state.
            factor=np.moveaxis(self._A, 2, 0).copy(),
            forgetting_factor=self._lambda.copy(),
            covariance_limit=self._limit.T.copy(),
            effective_count=self._n_eff.copy(),
            effective_count_sq=self._n_eff_sq.copy(),
            sample_count=self._count.copy(),
        )

    @classmethod
    def from_state(cls, state: BankState) -> RecursiveWLSBank:
        """Rebuild a bank exactly from :meth:`state`."""
        k, m, _ = state.factor.shape
        bank = cls(k, m - 1, state.forgetting_factor, state.covariance_limit)
        bank.restore(state)
        return bank

    def restore(self, state: BankState) -> None:
        """Take back a :meth:`state` of a bank of this shape and these settings; ``state()`` then equals it.

        Raises
        ------
        ValueError
            An array of another shape, or settings (forgetting factors, covariance limits) other than
            this bank's; nothing is changed then.
        """
        k, m = self.n_channels, self.n_params + 1
        expected = {"factor": (k, m, m), "forgetting_factor": (k,), "covariance_limit": (k, m - 1),
                    "effective_count": (k,), "effective_count_sq": (k,), "sample_count": (k,)}
        for name, shape in expected.items():
            if np.shape(getattr(state, name)) != shape:
                raise ValueError(f"state.{name} must have shape {shape}, got {np.shape(getattr(state, name))}")
        if not (np.array_equal(state.forgetting_factor, self._lambda)
                and np.array_equal(state.covariance_limit, self._limit.T)):
            raise ValueError("state holds other forgetting factors or covariance limits than this bank's")
        self._A[...] = np.moveaxis(state.factor, 0, 2)
        self._n_eff[...] = state.effective_count
        self._n_eff_sq[...] = state.effective_count_sq
        self._count[...] = state.sample_count

    def factor(self, channels: ArrayLike | None = None) -> FloatArray:
        """Augmented factor ``[[R, q], [0, rho]]`` per channel, shape (B, n+1, n+1) (a copy).

        ``channels`` selects B channels (default all K) without copying the rest first.
        """
        if channels is None:
            return np.moveaxis(self._A, 2, 0).copy()
        return np.moveaxis(self._A[:, :, np.asarray(channels, dtype=np.intp)], 2, 0)

    def solution(self, channels: ArrayLike | None = None) -> tuple[FloatArray, NDArray[np.bool_]]:
        """Current estimates by back-substitution ``R theta = q``.

        Parameters
        ----------
        channels : array_like of int, shape (B,), optional
            Channels to read (repeats allowed); default all.

        Returns
        -------
        theta : ndarray, shape (n, B)
            0 in the components that are not identifiable yet.
        identifiable : ndarray of bool, shape (B,)
            Every diagonal entry of R non-zero.
        """
        idx = self._all_channels if channels is None else np.asarray(channels, dtype=np.intp)
        A = self._A[:, :, idx]
        theta = back_substitute(A, Workspace(self.n_params, idx.shape[0])).copy()
        diagonal = np.arange(self.n_params)
        return theta, np.all(A[diagonal, diagonal] != 0.0, axis=0)

    def solution_one(self, channel: int) -> tuple[list[float], bool]:
        """Scalar twin of :meth:`solution` for one channel (same bits)."""
        A = self._A[:, :, channel].tolist()
        n = self.n_params
        return back_substitute_scalar(A, n), all(A[i][i] != 0.0 for i in range(n))

    def kappa(self, channels: ArrayLike | None = None) -> FloatArray:
        """Ratio ``sum lambda^(2(k-i)) / sum lambda^(k-i)`` per channel, shape (B,).

        With stationary regressors and weights, the covariance of the estimate
        is about ``kappa * P`` (sandwich ``P H_2 P`` with ``H_2`` the
        lambda^2-weighted information): 1 for lambda = 1, ``1 / (1 + lambda)``
        in steady state. 1 before the first sample.
        """
        idx = self._all_channels if channels is None else np.asarray(channels, dtype=np.intp)
        n1 = self._n_eff[idx]
        return np.where(n1 > 0.0, self._n_eff_sq[idx] / np.where(n1 > 0.0, n1, 1.0), 1.0)

    def kappa_one(self, channel: int) -> float:
        """Scalar twin of :meth:`kappa`."""
        n1 = float(self._n_eff[channel])
        return float(self._n_eff_sq[channel]) / n1 if n1 > 0.0 else 1.0

    @property
    def effective_count(self) -> FloatArray:
        """``sum lambda^(k-i)`` per channel, shape (K,) (a copy)."""
        return self._n_eff.copy()

    @property
    def sample_count(self) -> NDArray[np.int64]:
        """Samples applied per channel, shape (K,) (a copy)."""
        return self._count.copy()


def forgotten_excess(forgetting_factor: FloatArray, n_params: int) -> FloatArray:
    """``f = 2 (lambda^-n - 1)`` per channel, shape (K,): how far above its limit forgetting alone can take a ``P_jj``.

    Between two checks of parameter j, n forgettings raise ``P_jj / limit - 1`` from at most 0
    to at most ``lambda^-n - 1``; twice that, so rounding at the attained bound never reads
    as information that was never there (module docstring, anti-windup).
    """
    return np.asarray(2.0 * (forgetting_factor ** -float(n_params) - 1.0), dtype=np.float64)


def _anchor(excess: FloatArray, forgotten: FloatArray, theta_j: FloatArray) -> FloatArray:
    """Value of the bound's pseudo-observation, ``m_j = theta_j min(1, f / excess)`` (module docstring).

    ``excess = P_jj / limit - 1 > 0``; the scalar twin in :func:`estimator.recursive._givens.scalar_step`
    does the same operations.
    """
    with np.errstate(divide="ignore", invalid="ignore"):    # excess may round to 0: that lane takes theta_j
        return np.where(excess > forgotten, theta_j * (forgotten / excess), theta_j)


def _innovation(alpha: FloatArray, cos_product: FloatArray, sw: FloatArray,
                w: FloatArray, sl: FloatArray) -> UpdateResult:
    """e = alpha / (sqrt(w) prod(cos)); w z^T P z = lambda (1 - gamma) / gamma, gamma = prod(cos)^2."""
    ok = cos_product > 0.0
    with np.errstate(divide="ignore"):      # gamma underflows to 0: leverage inf, as in the scalar twin
        if ok.all():
            gamma = cos_product * cos_product
            innovation = alpha / (sw * cos_product)
            leverage = sl * sl * (1.0 - gamma) / gamma
        else:
            cp = np.where(ok, cos_product, 1.0)
            gamma = cp * cp
            innovation = np.where(ok, alpha / (sw * cp), np.nan)
            leverage = np.where(ok, sl * sl * (1.0 - gamma) / gamma, np.inf)
    return UpdateResult(innovation=innovation, leverage=leverage, weight=w.copy())
