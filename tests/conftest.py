"""Shared test factories: synthetic regression data, a bit-exact comparison of bank states, a PostgreSQL database."""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass, fields

import numpy as np
import pytest
from numpy.typing import NDArray

from estimator import BankState

# Under CI a skip fails; outside CI skips are listed loudly at the end (tests/ci.py).
pytest_plugins = ["tests.ci"]

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class RegressionData:
    """``y = Z theta + e / sqrt(w)``: heteroscedastic noise with known inverse-variance weights."""

    Z: FloatArray          # (N, n), first column 1 when with_constant
    y: FloatArray          # (N,)
    weight: FloatArray     # (N,), 1 / noise variance
    theta: FloatArray      # (n,), the true parameters


def _make_regression(seed: int, n_samples: int, n_params: int, *, noise: float = 0.1,
                     with_constant: bool = True, unit_weights: bool = False) -> RegressionData:
    rng = np.random.default_rng(seed)
    Z = rng.normal(size=(n_samples, n_params))
    if with_constant:
        Z[:, 0] = 1.0
    theta = rng.uniform(-2.0, 2.0, size=n_params)
    weight = np.ones(n_samples) if unit_weights else rng.uniform(0.2, 5.0, size=n_samples)
    y = Z @ theta + noise * rng.normal(size=n_samples) / np.sqrt(weight)
    return RegressionData(Z=Z, y=y, weight=weight, theta=theta)


@pytest.fixture
def make_regression() -> Callable[..., RegressionData]:
    """Factory ``make_regression(seed, n_samples, n_params, noise=0.1, with_constant=True, unit_weights=False)``."""
    return _make_regression


def _assert_same_state(actual: BankState, expected: BankState) -> None:
    for field in fields(BankState):
        a = getattr(actual, field.name)
        b = getattr(expected, field.name)
        assert a.dtype == b.dtype, field.name
        assert a.shape == b.shape, field.name
        # Bytes, not values: stricter than array_equal (tells -0.0 from 0.0, NaN payloads).
        assert np.ascontiguousarray(a).tobytes() == np.ascontiguousarray(b).tobytes(), field.name


@pytest.fixture
def assert_same_state() -> Callable[[BankState, BankState], None]:
    """Assert every array of two :class:`BankState` snapshots is identical bit for bit (dtype, shape, bytes)."""
    return _assert_same_state


POSTGRES_ADMIN = os.environ.get("RWLS_TEST_POSTGRES", "postgresql://postgres@127.0.0.1:5432/test")


@pytest.fixture
def postgres_url() -> Iterator[str]:
    """A fresh PostgreSQL database on 127.0.0.1 for one test (dropped afterwards); skipped without a server
    unless ``CI=true``, where a missing server fails the test."""
    import uuid

    import psycopg

    from tests.ci import in_ci

    name = f"rwls_test_{uuid.uuid4().hex[:12]}"
    try:
        admin = psycopg.connect(POSTGRES_ADMIN, autocommit=True, connect_timeout=5)
    except psycopg.OperationalError as exc:
        if in_ci():
            raise
        pytest.skip(f"no PostgreSQL at {POSTGRES_ADMIN}: {exc}")
    with admin:
        admin.execute(f'CREATE DATABASE "{name}"')
    base = POSTGRES_ADMIN.rsplit("/", 1)[0]
    try:
        yield f"{base}/{name}"
    finally:
        with psycopg.connect(POSTGRES_ADMIN, autocommit=True, connect_timeout=5) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')

