"""A channel's baseline: what it was at commissioning, the reference every drift judgement is made against.

A baseline holds the reference parameters with their own uncertainty, the
noise level, and (for channels with an operating-point noise model) the
model's coefficients. It is learned from the channel's own estimates at the
end of its commissioning period, taken from an offline ``rwls fit``, or set by
an engineer. Baselines are versioned: a recalibration adds a new version and
the old ones stay in the history.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

__all__ = ["SOURCES", "Baseline", "BaselineHistory"]

FloatArray = NDArray[np.float64]
SOURCES = ("learned", "fit", "engineer")


@dataclass(frozen=True, eq=False)
class Baseline:
    """One version of a channel's reference (compared by identity: it holds arrays).

    Attributes
    ----------
    parameters : shape (n,)
        theta_ref.
    covariance : shape (n, n)
        Covariance of theta_ref (zeros when it is taken as exact, e.g. an engineer's calibration).
    noise_sigma : float
        Noise standard deviation in engineering units at the baseline.
    noise_model : shape (m,), optional
        Coefficients of ``ln sigma^2 = z_op^T beta`` at the baseline.
    """

    version: int
    source: str
    parameters: FloatArray
    covariance: FloatArray
    noise_sigma: float
    noise_model: FloatArray | None = None
    t: float | None = None               # sample time it was set at (None: no sample time known)
    samples: int = 0                     # samples it was learned from (0 when set)
    note: str = ""

    def __post_init__(self) -> None:
        if self.source not in SOURCES:
            raise ValueError(f"source must be one of {', '.join(SOURCES)}, got {self.source!r}")
        theta = np.array(self.parameters, dtype=np.float64)
        cov = np.array(self.covariance, dtype=np.float64)
        n = theta.shape[0] if theta.ndim == 1 else -1
        if n < 1 or cov.shape != (n, n):
            raise ValueError(f"parameters must be (n,) and covariance (n, n), got {theta.shape} and {cov.shape}")
        if not (np.isfinite(theta).all() and np.isfinite(cov).all()):
            raise ValueError("baseline parameters and covariance must be finite")
        if not np.allclose(cov, cov.T, rtol=1e-9, atol=0.0) or np.linalg.eigvalsh(cov).min() < -1e-12 * max(
                1.0, float(np.abs(cov).max())):
            raise ValueError("baseline covariance must be symmetric positive semi-definite")
        if not (math.isfinite(self.noise_sigma) and self.noise_sigma > 0.0):
            raise ValueError(f"baseline noise_sigma must be finite and > 0, got {self.noise_sigma}")
        # Frozen copies: nobody holds a view of them.
        object.__setattr__(self, "parameters", theta)
        object.__setattr__(self, "covariance", cov)
        if self.noise_model is not None:
            beta = np.array(self.noise_model, dtype=np.float64)
            if beta.ndim != 1 or not np.isfinite(beta).all():
                raise ValueError("baseline noise_model must be a finite vector")
            object.__setattr__(self, "noise_model", beta)


@dataclass(slots=True)      # slots: one per channel
class BaselineHistory:
    """Every baseline of one channel, oldest first; the last is in force."""

    versions: list[Baseline] = field(default_factory=list)

    @property
    def current(self) -> Baseline | None:
        return self.versions[-1] if self.versions else None

    @property
    def next_version(self) -> int:
        return self.versions[-1].version + 1 if self.versions else 1

    def add(self, baseline: Baseline) -> None:
        if baseline.version != self.next_version:
            raise ValueError(f"baseline version must be {self.next_version}, got {baseline.version}")
        self.versions.append(baseline)
