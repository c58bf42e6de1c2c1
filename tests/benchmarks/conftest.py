"""Fixtures of the benchmarks (run with ``make bench``; not part of the default test run)."""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator

import numpy as np
import pytest

from service.runtime import tune_for_serving
from tests.benchmarks._common import environment_line
from tests.benchmarks._mqtt_load import BROKER_LIMITS, Broker
from tests.benchmarks._raw_paho import RawFigures, RawTagFigures, measure_raw, measure_raw_tags
from tests.support.mqtt_brokers import find_mosquitto, mosquitto_version, start_private_mosquitto


def pytest_report_header() -> str:
    return f"benchmarks on: {environment_line()}"


@pytest.fixture(scope="session", autouse=True)
def serving_interpreter() -> Iterator[None]:
    """The interpreter as ``rwls serve`` tunes it: the service benchmarks run a Runtime in this process."""
    before = sys.getswitchinterval()
    tune_for_serving()
    yield
    sys.setswitchinterval(before)


@pytest.fixture
def make_rng() -> Callable[[int], np.random.Generator]:
    """Factory of independent generators with fixed seeds (nothing seeds global state)."""

    def factory(seed: int) -> np.random.Generator:
        return np.random.default_rng(seed)

    return factory


@pytest.fixture(scope="session")
def bench_broker(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Broker]:
    """A private Mosquitto for the service benchmarks, with the queue limits set deliberately
    (``tests/benchmarks/_mqtt_load.py`` says why); stopped by PID."""
    binary = find_mosquitto()
    if binary is None:
        pytest.skip("no mosquitto binary for a private broker")
    started = start_private_mosquitto(binary, tmp_path_factory.mktemp("bench-mosquitto"), persistence=False,
                                      max_queued_messages=None, extra_config=BROKER_LIMITS)
    settings = [line for line in started.config_path.read_text().splitlines()
                if line and not line.startswith(("#", "log_"))]
    description = f"{mosquitto_version(binary)}, private, pid {started.pid}, config: {'; '.join(settings)}"
    try:
        yield Broker(started.port, started.pid, description)
    finally:
        started.stop()


@pytest.fixture(scope="session")
def raw(bench_broker: Broker) -> RawFigures:
    """The bare paho subscriber's figures, measured once per run and printed beside every service figure."""
    return measure_raw(bench_broker)


@pytest.fixture(scope="session")
def raw_tags(bench_broker: Broker) -> RawTagFigures:
    """The bare paho subscriber on the publisher's tag shape, measured once per run, printed beside the tag
    benchmarks' figures."""
    return measure_raw_tags(bench_broker)
