"""Three replicas of ``rwls serve`` as separate processes, sharing 12 channels, Mosquitto and PostgreSQL.

Every channel is owned by exactly one replica; a read through any replica gives the same answer; a
replica killed by PID leaves its channels Bad (``replica_unreachable``) in the fleet snapshot the others
serve; restarted, it resumes from its checkpoint and the broker's persistent session, and no sample
published while it was down is lost.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.fleet.sharding import owner
from tests.support.addresses import free_port
from tests.support.configs import QUICK_RECONNECT, alarms_table, mqtt_settings
from tests.support.mqtt_clients import publish_and_wait
from tests.support.service_process import ServiceProcess
from tests.support.waits import wait_until

pytestmark = pytest.mark.integration

REPLICAS = 3
CHANNELS = [f"site{s}.unit{u}" for s in range(3) for u in range(4)]
FIRST, SECOND = 30, 20                       # samples per channel before and while a replica is down


def _samples(prefix: str, start: int, count: int) -> list[tuple[str, bytes]]:
    rng = np.random.default_rng(start)
    out = []
    for k in range(start, start + count):
        for cid in CHANNELS:
            u = float(rng.uniform(0.0, 1.0))
            body = {"t": 1_767_225_600.0 + 10.0 * k, "y": 1.0 + 3.0 * u + float(rng.normal(0.0, 0.05)),
                    "u": {"u": u}, "seq": k}
            out.append((f"{prefix}/{cid}", json.dumps(body).encode()))
    return out


def test_three_replicas_share_the_channels_survive_a_kill_and_lose_nothing(
        mqtt_broker: Any, postgres_url: str, unique_prefix: str, client_id: Callable[[str], str],
        tmp_path: Path) -> None:
    ports = [free_port() for _ in range(REPLICAS)]
    urls = [f"http://127.0.0.1:{p}" for p in ports]
    base_id = client_id("rwls-fleet")
    replicas = []
    for k in range(REPLICAS):
        settings = mqtt_settings(
            {c: {"terms": ["1", "u"]} for c in CHANNELS}, prefix=unique_prefix, port=mqtt_broker.port,
            client_id=f"{base_id}-{k}", broker=QUICK_RECONNECT, store=tmp_path / f"data-{k}",
            store_options={"url": postgres_url, "checkpoint_seconds": 1.0}, alarms=alarms_table(unique_prefix),
            fleet={"shard": f"{k}/{REPLICAS}", "replicas": urls, "peer_timeout": 1.0})
        replicas.append(ServiceProcess(settings, tmp_path / f"replica-{k}", port=ports[k]))
    try:
        for r in replicas:
            r.start()
        for r in replicas:
            r.wait_subscribed()

        # Every channel owned by exactly one replica, the one the stable hash names.
        local = [set(r.get("/api/v1/snapshot?scope=local")["channels"]) for r in replicas]
        for k, mine in enumerate(local):
            assert mine == {c for c in CHANNELS if owner(c, REPLICAS) == k}
        assert set().union(*local) == set(CHANNELS) and sum(map(len, local)) == len(CHANNELS)

        publish_and_wait(mqtt_broker, _samples(unique_prefix, 0, FIRST), qos=1, timeout=30.0)
        started = time.monotonic()
        wait_until(lambda: all(e.get("samples") == FIRST
                               for e in replicas[0].get("/api/v1/snapshot")["channels"].values()),
                   30.0, "the fleet to apply the first samples")
        first_seconds = time.monotonic() - started

        # Reads through any replica agree, for every channel (proxied to the owner).
        for cid in CHANNELS:
            answers = [r.get(f"/api/v1/channels/{cid}") for r in replicas]
            assert answers[0]["samples"] == FIRST
            assert answers[1] == answers[0] and answers[2] == answers[0], cid
            rows = [r.get(f"/api/v1/channels/{cid}/history?limit=10")["rows"] for r in replicas]
            assert rows[1] == rows[0] and rows[2] == rows[0]
        lists = [r.get("/api/v1/channels") for r in replicas]
        assert [c["id"] for c in lists[0]] == CHANNELS and lists[1] == lists[0] == lists[2]

        # Replica 2 killed by PID: its channels Bad in the fleet snapshot the others serve.
        victim = replicas[2]
        victim.kill()
        for r in replicas[:2]:
            fleet = r.get("/api/v1/snapshot")
            for cid, entry in fleet["channels"].items():
                if owner(cid, REPLICAS) == 2:
                    assert entry["quality"] == "Bad" and entry["quality_reason"] == "replica_unreachable", cid
                else:
                    assert entry["samples"] == FIRST, cid
            assert [x["reachable"] for x in fleet["replicas"]] == [True, True, False]
        gone = next(c for c in CHANNELS if owner(c, REPLICAS) == 2)
        assert replicas[0].get(f"/api/v1/channels/{gone}")["detail"] == "replica_unreachable"

        # Samples keep coming while it is down; restarted, it resumes and loses none.
        publish_and_wait(mqtt_broker, _samples(unique_prefix, FIRST, SECOND), qos=1, timeout=30.0)
        restarted = time.monotonic()
        victim.start()
        wait_until(lambda: all(e.get("samples") == FIRST + SECOND
                               for e in replicas[0].get("/api/v1/snapshot")["channels"].values()),
                   60.0, "the restarted replica to catch up")
        recovery = time.monotonic() - restarted               # process start, recovery, the broker's backlog
        assert [x["reachable"] for x in replicas[1].get("/api/v1/snapshot")["replicas"]] == [True, True, True]
        stats = victim.get("/api/v1/channels?scope=local")
        assert all(c["samples"] == FIRST + SECOND and c["rejected"] == 0 for c in stats)
        print(f"\nfleet: {REPLICAS} replicas, {len(CHANNELS)} channels ({[len(m) for m in local]} each); "
              f"{FIRST * len(CHANNELS)} samples applied fleet-wide in {first_seconds:.2f} s after publishing; "
              f"replica 2 killed, {SECOND * len(CHANNELS)} samples published meanwhile; restarted and caught up "
              f"in {recovery:.2f} s")
    finally:
        for r in replicas:
            r.kill()

