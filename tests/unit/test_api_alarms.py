"""Alarm, journal, baseline and reset routes and the event stream, in-process (FastAPI TestClient)."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.api.app import create_app
from service.engine.operations import Inspect
from service.runtime import Runtime
from tests.support.auth_tokens import auth_section, bearer
from tests.support.clients import api_client
from tests.support.runtimes import offline_runtime

# One channel that commissions after 60 samples, with a touchy offset detector and no delays.
CHANNEL = {"terms": ["1", "u"], "forgetting_factor": 0.99,
           "detectors": {"commissioning_samples": 60, "calibration_samples": 0, "offset": {"k": 1.0, "h": 5.0}},
           "alarms": {"offset": {"priority": "urgent"}}}
ROLE = "engineer"          # the role of every client here: reads, posts, operates and configures


@pytest.fixture
def served(tmp_path: Path, serve: Callable[..., Any]) -> tuple[Runtime, Any]:
    runtime = offline_runtime({"dp": CHANNEL}, tmp_path / "store", auth=auth_section())
    return runtime, serve(runtime, ROLE)


def _post(client: Any, samples: list[dict[str, Any]]) -> None:
    for start in range(0, len(samples), 20):
        response = client.post("/api/v1/channels/dp/samples", json={"samples": samples[start:start + 20]})
        assert response.status_code == 202, response.text


def _samples(first: int, count: int, offset: float = 0.0, seed: int = 0) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed + first)
    out = []
    for k in range(first, first + count):
        u = float(rng.normal())
        out.append({"t": 1000.0 + k, "y": 1.0 + 0.5 * u + offset + float(rng.normal(0.0, 0.1)), "u": {"u": u},
                    "seq": k})
    return out


def _settle(runtime: Runtime) -> None:
    assert runtime.engine.drain(10.0)
    runtime.engine.execute(Inspect(lambda engine: None))   # an operation after the samples: their snapshot is out


def _raise_offset(runtime: Runtime, client: Any) -> None:
    _post(client, _samples(0, 100))
    _settle(runtime)
    _post(client, _samples(100, 20, offset=1.0))        # a 10-sigma step
    _settle(runtime)


def test_commissioning_suppresses_then_an_offset_raises_an_unacknowledged_alarm(served: tuple[Runtime, Any]) -> None:
    runtime, client = served
    _post(client, _samples(0, 30))
    _settle(runtime)
    listed = client.get("/api/v1/alarms", params={"include_normal": True}).json()
    assert {a["state"] for a in listed["alarms"] if a["kind"] != "stale"} == {"Suppressed by design"}
    _raise_offset(runtime, client)
    raised = client.get("/api/v1/alarms").json()["alarms"]
    offset = [a for a in raised if a["kind"] == "offset"]
    assert offset and offset[0]["state"] == "Unacknowledged" and offset[0]["priority"] == "urgent"
    assert offset[0]["evidence"]["statistic"] > offset[0]["evidence"]["limit"] == 5.0
    assert offset[0]["evidence"]["baseline"] == 1 and offset[0]["evidence"]["onset"] is not None
    detail = client.get("/api/v1/channels/dp").json()
    assert detail["baseline"]["version"] == 1 and detail["detectors"]["offset"]["active"] is True
    summary = client.get("/api/v1/channels").json()[0]["alarms"]
    assert summary["highest_active"] == "urgent" and summary["unacknowledged"] >= 1


def test_the_channel_list_says_how_far_commissioning_is_and_null_once_a_baseline_is_in_force(
        served: tuple[Runtime, Any]) -> None:
    runtime, client = served
    assert client.get("/api/v1/channels").json()[0]["commissioning"] == {"done": 0, "needed": 60}
    _post(client, _samples(0, 30))
    _settle(runtime)
    detail = client.get("/api/v1/channels/dp").json()
    assert detail["baseline"] is None
    assert client.get("/api/v1/channels").json()[0]["commissioning"] == {"done": detail["commissioned"],
                                                                          "needed": 60}
    assert detail["commissioned"] == 30
    _post(client, _samples(30, 70))
    _settle(runtime)
    assert client.get("/api/v1/channels/dp").json()["baseline"]["version"] == 1
    assert client.get("/api/v1/channels").json()[0]["commissioning"] is None


def test_acknowledge_and_shelve_are_journaled_with_user_and_refused_when_not_allowed(
        served: tuple[Runtime, Any]) -> None:
    runtime, client = served
    _raise_offset(runtime, client)
    operator = bearer("operator")
    ack = client.post("/api/v1/alarms/dp:offset/ack", json={"user": "ana", "comment": "seen on site"},
                      headers=operator)
    assert ack.status_code == 200 and ack.json()["alarm"]["state"] == "Acknowledged"
    again = client.post("/api/v1/alarms/dp:offset/ack", json={"user": "ana"}, headers=operator)
    assert again.status_code == 409 and again.json()["detail"] == "not_acknowledgeable"
    shelved = client.post("/api/v1/alarms/dp:offset/shelve", json={"minutes": 30}, headers=operator)
    assert shelved.status_code == 200 and shelved.json()["alarm"]["state"] == "Shelved"
    assert client.post("/api/v1/alarms/dp:colour/ack", json={"user": "ana"}).status_code == 404
    assert client.post("/api/v1/alarms/dp:offset/ack", json={"who": "ana"}, headers=operator).status_code == 422
    journal = client.get("/api/v1/alarms/journal", params={"channel": "dp"}).json()["entries"]
    mine = [(e["action"], e["user"], e["after"]) for e in journal if e["alarm"] == "dp:offset"]
    # The token's holder is the journal's user; a name in the body is the person behind a shared token.
    assert ("acknowledge", "ana via test-operator", "Acknowledged") in mine
    assert ("shelve", "test-operator", "Shelved") in mine
    assert [e["seq"] for e in journal] == sorted(e["seq"] for e in journal)
    later = client.get("/api/v1/alarms/journal", params={"after": journal[-2]["seq"]}).json()["entries"]
    assert [e["seq"] for e in later] == [journal[-1]["seq"]]


def test_baseline_learn_set_and_reset(served: tuple[Runtime, Any]) -> None:
    runtime, client = served
    assert client.post("/api/v1/channels/dp/baseline", json={"user": "eve"}).status_code == 409   # no data yet
    _post(client, _samples(0, 100))
    _settle(runtime)
    learned = client.post("/api/v1/channels/dp/baseline", json={"user": "eve", "comment": "after service"})
    assert learned.status_code == 200 and learned.json()["baseline"]["version"] == 2       # 1 was commissioning
    bad = client.post("/api/v1/channels/dp/baseline", json={"user": "eve", "action": "set",
                                                            "parameters": {"1": 1.0}, "noise_sigma": 0.1})
    assert bad.status_code == 422
    put = client.post("/api/v1/channels/dp/baseline", json={"user": "eve", "action": "set", "noise_sigma": 0.1,
                                                            "parameters": {"1": 1.0, "u": 0.5}})
    assert put.status_code == 200 and put.json()["baseline"]["source"] == "engineer"
    history = client.get("/api/v1/channels/dp/baselines").json()
    assert [b["version"] for b in history["baselines"]] == [1, 2, 3] and history["in_force"] == 3
    assert client.post("/api/v1/channels/dp/reset", json={"user": "eve"}).status_code == 200
    _settle(runtime)
    after = client.get("/api/v1/channels/dp").json()
    assert after["baseline"] is None and after["commissioned"] == 0 and after["samples"] == 100
    assert client.post("/api/v1/channels/nobody/reset", json={"user": "eve"}).status_code == 404


def test_event_stream_sends_the_alarms_then_each_transition_and_ends_when_the_service_stops(
        tmp_path: Path) -> None:
    runtime = offline_runtime({"dp": CHANNEL}, tmp_path / "store", auth=auth_section())
    events: list[dict[str, Any]] = []
    with api_client(create_app(runtime), ROLE) as client:
        def listen() -> None:
            with client.stream("GET", "/api/v1/events") as response:
                assert response.headers["content-type"].startswith("text/event-stream")
                for line in response.iter_lines():
                    if line.startswith("data: "):
                        events.append(json.loads(line[6:]))
        reader = threading.Thread(target=listen, daemon=True)
        reader.start()
        deadline = time.monotonic() + 10.0
        while not events and time.monotonic() < deadline:
            time.sleep(0.02)
        _raise_offset(runtime, client)
        deadline = time.monotonic() + 10.0
        while not any(e.get("type") == "alarm" and e["alarm"]["kind"] == "offset" for e in events) \
                and time.monotonic() < deadline:
            time.sleep(0.02)
        started = time.monotonic()
        runtime.events.close()                        # what shutdown does first: the stream ends by itself
        reader.join(10.0)
        assert not reader.is_alive() and time.monotonic() - started < 5.0
    assert events[0]["type"] == "alarms" and len(events[0]["alarms"]) == 5
    offsets = [e for e in events if e.get("type") == "alarm" and e["alarm"]["kind"] == "offset"]
    assert offsets and offsets[-1]["entry"]["after"] == "Unacknowledged"
