"""One service in the test's own process (``service.runtime.Runtime``): made without MQTT, or started on a
broker and waited on until it is subscribed; fed messages and drained."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from service.broker_link.messages import Message
from service.config.settings import RwlsConfig
from service.runtime import Runtime
from tests.support.configs import offline_config

__all__ = ["assert_same_arrays", "feed", "offline_runtime", "start_subscribed", "state_arrays"]

WALL_CLOCK = frozenset({"engine.updated_at"})      # arrival times: what the wall clock said, not the inputs


def offline_runtime(channels: Mapping[str, Mapping[str, Any]], store: Path | str, *,
                    store_options: Mapping[str, Any] | None = None, **sections: Any) -> Runtime:
    """A Runtime without MQTT of :func:`~tests.support.configs.offline_config` (same arguments); not started."""
    return Runtime(offline_config(channels, store, store_options=store_options, **sections), mqtt=False)


def start_subscribed(config: RwlsConfig, timeout: float = 10.0) -> Runtime:
    """Start a Runtime with its MQTT ingest and wait until the broker granted every subscription (SUBACK):
    what is published after this reaches it."""
    runtime = Runtime(config)
    runtime.start()
    try:
        assert runtime.ingest is not None and runtime.ingest.wait_subscribed(timeout)
    except BaseException:
        runtime.stop()                   # not subscribed: nothing the test holds would stop it
        raise
    return runtime


def feed(runtime: Runtime, messages: Iterable[Message], *, submit_timeout: float = 5.0,
         drain_timeout: float = 20.0) -> None:
    """Hand every message to the engine (each within ``submit_timeout`` s), then wait until all are applied
    (within ``drain_timeout`` s)."""
    for message in messages:
        assert runtime.engine.submit(message, timeout=submit_timeout)
    assert runtime.engine.drain(drain_timeout)


def state_arrays(runtime: Runtime) -> dict[str, np.ndarray]:
    """The arrays of ``runtime``'s checkpoint state (bank, alarms, tags), without those the wall clock sets."""
    persistence = runtime.persistence
    assert persistence is not None, "the runtime has a store"
    arrays, _ = persistence.state(runtime.engine)
    return {name: array for name, array in arrays.items() if name not in WALL_CLOCK}


def assert_same_arrays(expected: dict[str, np.ndarray], runtime: Runtime) -> None:
    """``runtime``'s :func:`state_arrays` equal ``expected``, every array bit for bit (the differing one named)."""
    got = state_arrays(runtime)
    assert got.keys() == expected.keys()
    for name in expected:
        assert got[name].tobytes() == expected[name].tobytes(), name
