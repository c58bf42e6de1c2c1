"""Fixtures of the benchmarks (run with ``make bench``; not part of the default test run)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest

from tests.benchmarks._common import environment_line


def pytest_report_header() -> str:
    return f"benchmarks on: {environment_line()}"


@pytest.fixture
def make_rng() -> Callable[[int], np.random.Generator]:
    """Factory of independent generators with fixed seeds (nothing seeds global state)."""

    def factory(seed: int) -> np.random.Generator:
        return np.random.default_rng(seed)

    return factory
