"""The fixtures every test layer may ask for (a pytest plugin, registered by ``tests/conftest.py``).

Brokers and names:

- ``mqtt_broker`` (session): the MQTT broker on 127.0.0.1, chosen in this order:

  1. the system broker, when 127.0.0.1:1883 accepts an MQTT CONNECT (kind ``"mosquitto-system"``);
  2. a private Mosquitto on a free port, when a ``mosquitto`` binary exists (``"mosquitto-private"``);
  3. the in-process :class:`service.demo.embedded_broker.EmbeddedBroker` (``"embedded"``), only when ``CI`` is
     not ``"true"``: CI must test against a real Mosquitto, so there it fails instead.

  ``RWLS_TEST_BROKER=system|private|embedded`` forces one choice (``auto``, the default, is the order above).
- ``private_mosquitto``: Mosquittos of the test's own; ``unique_prefix`` and ``client_id``: MQTT names of the
  test alone.
- ``postgres_url``: a PostgreSQL database of the test's own.

Services and data:

- ``start_runtime``: in-process services started on a broker and subscribed, stopped after the test;
  ``serve``: a runtime's app behind a TestClient for the test's duration.
- ``make_regression`` and ``assert_same_state``: synthetic regression data, bank states compared bit for bit.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from tests.ci import in_ci
from tests.support import state_equality
from tests.support.addresses import LOOPBACK, unique_client_id, unique_topic_prefix
from tests.support.clients import api_client
from tests.support.mqtt_brokers import (
    BrokerInfo,
    PrivateMosquitto,
    find_mosquitto,
    probe_mqtt,
    start_private_mosquitto,
)
from tests.support.regression_data import make_regression as _make_regression

if TYPE_CHECKING:
    from fastapi.testclient import TestClient

    from estimator import BankState
    from service.config.settings import RwlsConfig
    from service.runtime import Runtime
    from tests.support.regression_data import RegressionData

SYSTEM_PORT = 1883
POSTGRES_ADMIN = os.environ.get("RWLS_TEST_POSTGRES", "postgresql://postgres@127.0.0.1:5432/test")


# ------------------------------------------------------------------------------------------ brokers, names
@pytest.fixture(scope="session")
def mqtt_broker(tmp_path_factory: pytest.TempPathFactory) -> Iterator[BrokerInfo]:
    """The session's MQTT broker on 127.0.0.1: an object with ``host``, ``port``, ``url`` and ``kind``."""
    choice = os.environ.get("RWLS_TEST_BROKER", "auto").strip().lower() or "auto"
    if choice not in ("auto", "system", "private", "embedded"):
        pytest.fail(f"RWLS_TEST_BROKER={choice!r}: expected auto, system, private or embedded")

    if choice in ("auto", "system"):
        if probe_mqtt(LOOPBACK, SYSTEM_PORT, timeout=2.0):
            yield BrokerInfo(LOOPBACK, SYSTEM_PORT, "mosquitto-system")
            return
        if choice == "system":
            pytest.fail(f"RWLS_TEST_BROKER=system but nothing answers MQTT on {LOOPBACK}:{SYSTEM_PORT}")

    binary = find_mosquitto()
    if choice in ("auto", "private") and binary is not None:
        private = start_private_mosquitto(binary, tmp_path_factory.mktemp("mosquitto-session"), persistence=False)
        try:
            yield BrokerInfo(LOOPBACK, private.port, private.kind)
        finally:
            private.stop()
        return
    if choice == "private":
        pytest.fail("RWLS_TEST_BROKER=private but no mosquitto binary was found")

    if in_ci():
        if choice == "embedded":
            pytest.fail("RWLS_TEST_BROKER=embedded is refused with CI=true: CI tests against a real Mosquitto")
        pytest.fail(
            "CI=true needs a real Mosquitto: nothing answers MQTT on 127.0.0.1:1883 and no `mosquitto` binary "
            "is on PATH (install Debian's mosquitto package, or start it in .ci/run)")

    from service.demo.embedded_broker import EmbeddedBroker  # needs amqtt; only imported when it is used

    with EmbeddedBroker() as embedded:
        yield BrokerInfo(embedded.host, embedded.port, "embedded")


@pytest.fixture
def private_mosquitto(tmp_path: Path) -> Iterator[Callable[..., PrivateMosquitto]]:
    """Factory for Mosquittos of this test's own, persistence ON under ``tmp_path``, already started.

    ``private_mosquitto(persistence=True, max_queued_messages=100_000, extra_config=())`` -> an object with
    ``host``, ``port``, ``url``, ``pid``, ``stop()`` (SIGTERM by PID, bounded wait), ``kill()`` (SIGKILL),
    ``start()`` (same port, same persistence directory) and ``log_tail()``. All are stopped after the test.
    Skips without a ``mosquitto`` binary, except under ``CI=true`` where it fails.
    """
    binary = find_mosquitto()
    if binary is None:
        if in_ci():
            pytest.fail("CI=true needs a `mosquitto` binary for private_mosquitto")
        pytest.skip("no mosquitto binary for a private broker")

    started: list[PrivateMosquitto] = []

    def make(**kwargs: Any) -> PrivateMosquitto:
        kwargs.setdefault("persistence", True)
        kwargs.setdefault("max_queued_messages", 100_000)
        broker = start_private_mosquitto(binary, tmp_path / f"mosquitto-{len(started)}", **kwargs)
        started.append(broker)
        return broker

    try:
        yield make
    finally:
        for broker in started:
            broker.stop()


@pytest.fixture
def unique_prefix() -> str:
    """A topic prefix of this test alone, ``rwls-test/<uuid hex>``."""
    return unique_topic_prefix()


@pytest.fixture
def client_id() -> Callable[[str], str]:
    """``client_id(name)`` -> a unique MQTT client id (at most 23 characters) starting with ``name``."""
    return unique_client_id


@pytest.fixture
def postgres_url() -> Iterator[str]:
    """A fresh PostgreSQL database on 127.0.0.1 for one test (dropped afterwards); skipped without a server
    unless ``CI=true``, where a missing server fails the test."""
    import uuid

    import psycopg

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


# ------------------------------------------------------------------------------------------------ services
@pytest.fixture
def start_runtime() -> Iterator[Callable[[RwlsConfig], Runtime]]:
    """``start_runtime(config)`` -> a Runtime with MQTT ingest, started and subscribed
    (:func:`~tests.support.runtimes.start_subscribed`); every one is stopped after the test."""
    from tests.support.runtimes import start_subscribed

    started: list[Runtime] = []

    def start(config: RwlsConfig) -> Runtime:
        runtime = start_subscribed(config)
        started.append(runtime)
        return runtime

    yield start
    for runtime in started:
        runtime.stop()


@pytest.fixture
def serve() -> Iterator[Callable[..., TestClient]]:
    """``serve(runtime, role=None, **client_options)`` -> a TestClient of the runtime's app, entered (the app's
    lifespan starts the runtime) and closed after the test (which stops it); with ``role``, requests carry
    that role's test token."""
    from service.api.app import create_app

    with contextlib.ExitStack() as entered:
        def enter(runtime: Runtime, role: str | None = None, **client_options: Any) -> TestClient:
            return entered.enter_context(api_client(create_app(runtime), role, **client_options))

        yield enter


# ---------------------------------------------------------------------------------------------------- data
@pytest.fixture
def make_regression() -> Callable[..., RegressionData]:
    """Factory ``make_regression(seed, n_samples, n_params, noise=0.1, with_constant=True, unit_weights=False)``."""
    return _make_regression


@pytest.fixture
def assert_same_state() -> Callable[[BankState, BankState], None]:
    """Assert two exported states are identical bit for bit (:func:`tests.support.state_equality.assert_same_state`)."""
    return state_equality.assert_same_state
