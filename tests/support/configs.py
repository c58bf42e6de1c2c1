"""Settings the tests build a service from: a store in the test's folder, channels on topics of the test alone,
a broker on loopback.

:func:`offline_config` is a validated configuration without a broker (samples arrive by ``engine.submit`` or
HTTP); :func:`mqtt_settings` is the settings table of a service fed through MQTT, for ``parse_config`` or a
:class:`~tests.support.service_process.ServiceProcess`. The smaller builders are for tests that assemble a
table of their own.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from service.config.settings import RwlsConfig, parse_config
from tests.support.addresses import LOOPBACK

__all__ = ["QUICK_RECONNECT", "alarms_table", "broker_table", "mqtt_settings", "offline_config", "on_topics"]

Table = Mapping[str, Any]

# Seconds between reconnection attempts: a restarted or refusing broker is tried again at once, not after 30 s.
QUICK_RECONNECT: dict[str, float] = {"reconnect_min_delay": 0.5, "reconnect_max_delay": 1.0}


def offline_config(channels: Mapping[str, Table], store: Path | str, *, store_options: Table | None = None,
                   **sections: Any) -> RwlsConfig:
    """``channels``, the store at ``store`` (with ``store_options``: ``checkpoint_seconds``, ``history_step``,
    ...) and any other ``sections`` (``auth``, ``engine``, ``broker``, ``fleet``), validated."""
    return parse_config({"channels": channels, "store": {"path": str(store), **(store_options or {})}, **sections})


def on_topics(channels: Mapping[str, Table], prefix: str) -> dict[str, dict[str, Any]]:
    """Each channel's table with its topic ``<prefix>/<channel id>``."""
    return {cid: {**table, "topic": f"{prefix}/{cid}"} for cid, table in channels.items()}


def broker_table(port: int, client_id: str, prefix: str, **options: Any) -> dict[str, Any]:
    """The ``broker`` table for an MQTT broker on 127.0.0.1:``port``; dead letters go to ``<prefix>/dead``
    unless ``options`` name another ``dead_letter_topic``."""
    return {"url": f"mqtt://{LOOPBACK}:{port}", "client_id": client_id, "dead_letter_topic": f"{prefix}/dead",
            **options}


def alarms_table(prefix: str, **options: Any) -> dict[str, Any]:
    """The ``alarms`` table: alarm states and events published under ``<prefix>/alarms``."""
    return {"topic": f"{prefix}/alarms", **options}


def mqtt_settings(channels: Mapping[str, Table], *, prefix: str, port: int, client_id: str, store: Path | str,
                  store_options: Table | None = None, broker: Table | None = None,
                  **sections: Any) -> dict[str, Any]:
    """Settings of a service fed through MQTT: ``channels`` on topics under ``prefix``, the broker on loopback
    ``port`` (``broker`` adds to or overrides its table), the store at ``store`` (with ``store_options``) and
    any other ``sections``."""
    return {"channels": on_topics(channels, prefix),
            "broker": broker_table(port, client_id, prefix, **(broker or {})),
            "store": {"path": str(store), **(store_options or {})}, **sections}
