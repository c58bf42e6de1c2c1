"""Fixtures for the broker-backed tests: a session broker, private Mosquittos, unique topics and client ids.

``mqtt_broker`` (session) picks, in this order:

1. the system broker, when 127.0.0.1:1883 accepts an MQTT CONNECT (kind ``"mosquitto-system"``);
2. a private Mosquitto on a free port, when a ``mosquitto`` binary exists (``"mosquitto-private"``);
3. the in-process :class:`service.demo.embedded_broker.EmbeddedBroker` (``"embedded"``), only when ``CI`` is not
   ``"true"``: CI must test against a real Mosquitto, so there it fails instead.

``RWLS_TEST_BROKER=system|private|embedded`` forces one choice (``auto``, the default, is the order above).

Helpers importable by tests: ``from tests.integration.mqtt_support import publish_and_wait, Collector``.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.ci import in_ci
from tests.integration.mqtt_support import (
    LOOPBACK,
    BrokerInfo,
    Collector,
    PrivateMosquitto,
    find_mosquitto,
    probe_mqtt,
    publish_and_wait,
    unique_client_id,
    unique_topic_prefix,
)

__all__ = ["BrokerInfo", "Collector", "PrivateMosquitto", "publish_and_wait"]

SYSTEM_PORT = 1883


def _start_private(binary: str, workdir: Path, attempts: int = 3, **kwargs: Any) -> PrivateMosquitto:
    """Start a private Mosquitto; retry on a new free port if another process took the one we picked."""
    error: Exception | None = None
    for attempt in range(attempts):
        broker = PrivateMosquitto(binary, workdir / f"try{attempt}", **kwargs)
        try:
            return broker.start()
        except RuntimeError as exc:
            error = exc
    raise RuntimeError(f"could not start a private mosquitto in {attempts} attempts") from error


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
        private = _start_private(binary, tmp_path_factory.mktemp("mosquitto-session"), persistence=False)
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
        broker = _start_private(binary, tmp_path / f"mosquitto-{len(started)}", **kwargs)
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
