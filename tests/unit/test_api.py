"""The REST API in-process (FastAPI TestClient, no network): views, HTTP ingest, errors, health, metrics, lock."""

from __future__ import annotations

import asyncio
import base64
import hashlib
import itertools
import json
import math
import re
from collections.abc import Callable
from dataclasses import fields, is_dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pytest
from fastapi import FastAPI
from prometheus_client.parser import text_string_to_metric_families

from service.api.app import create_app
from service.engine.host_faults import FaultPart
from service.offline.replay import replay_file
from service.runtime import AlreadyRunning, Runtime
from tests.support.auth_tokens import auth_section, bearer
from tests.support.clients import api_client
from tests.support.configs import offline_config
from tests.support.runtimes import offline_runtime

if TYPE_CHECKING:
    from fastapi.testclient import TestClient

DRAIN_SECONDS = 10.0
SOURCE = "source"          # the role of every client here: reads and posts samples
MAX_PAYLOAD = 4096

# Two channels share an estimator shape (one group, vectorised rounds); the other two have groups of their own.
CHANNELS: dict[str, dict[str, object]] = {
    "flow": {"terms": ["1", "u", "u^2"], "forgetting_factor": 0.998,
             "weight_rules": [{"input": "u", "low": 0.8, "high": 1.2, "factor": 2.0}]},
    "flow.b": {"terms": ["1", "u", "u^2"], "weighting": "sample"},
    "temp": {"terms": ["1", "v"], "weighting": "tracked", "noise": {"robust": True, "initial_sigma": 0.2}},
    "o2": {"terms": ["1", "y[-1]", "u"], "weighting": "tracked", "noise": {"model_terms": ["1", "u"]}},
}
INPUTS = {"flow": ("u",), "flow.b": ("u",), "temp": ("v",), "o2": ("u",)}
REPORT_FIELDS = {"terms", "parameters", "std_errors", "intervals_95", "covariance", "residual_sd", "residual_sd_scale",
                 "noise_sigma",
                 "commissioned", "baseline", "detectors", "alarms",
                 "samples", "rejected", "rejections", "warmup", "forgetting_factor", "weighting",
                 "covariance_scale", "effective_count", "min_information", "information_condition"}
IDENTITY_FIELDS = {"id", "quality", "quality_reason", "updated_at", "t"}


# ----------------------------------------------------------------- helpers
def _no_constant(name: str) -> object:
    raise AssertionError(f"{name} in a JSON response")


def _strict_json(text: str) -> Any:
    """Parse a response body, failing on the NaN/Infinity/-Infinity constants JSON does not have."""
    return json.loads(text, parse_constant=_no_constant)


def _history(seed: int, n: int) -> dict[str, list[dict[str, Any]]]:
    """``n`` samples per channel, with strictly increasing ``t`` and ``seq``; plain floats (exact in JSON and CSV)."""
    rng = np.random.default_rng(seed)
    out: dict[str, list[dict[str, Any]]] = {cid: [] for cid in CHANNELS}
    y_prev = 3.0
    for k in range(n):
        t = 1_767_225_600.0 + 60.0 * k
        u = float(rng.uniform(0.5, 2.0))
        out["flow"].append({"t": t, "y": float(1.0 + 0.6 * u + 0.4 * u * u + 0.05 * rng.normal()),
                            "u": {"u": u}, "seq": k})
        u_b = float(rng.uniform(0.5, 2.0))
        sigma = float(rng.uniform(0.05, 0.2))
        out["flow.b"].append({"t": t, "y": float(2.0 - 0.3 * u_b + 0.1 * u_b * u_b + sigma * rng.normal()),
                              "u": {"u": u_b}, "sigma": sigma, "seq": k})
        v = float(rng.normal(60.0, 5.0))
        out["temp"].append({"t": t, "y": float(0.5 + 0.99 * v + 0.1 * rng.normal()), "u": {"v": v}, "seq": k})
        u_o = float(rng.uniform(0.2, 1.0))
        y_o = float(1.0 + 0.5 * y_prev + 2.0 * u_o + 0.05 * rng.normal())
        out["o2"].append({"t": t, "y": y_o, "u": {"u": u_o}, "seq": k})
        y_prev = y_o
    return out


def _post_history(client: TestClient, history: dict[str, list[dict[str, Any]]], batch: int = 8) -> None:
    """Post every channel's samples in batches, channels interleaved (so micro-batches mix channels)."""
    longest = max(len(samples) for samples in history.values())
    for start in range(0, longest, batch):
        for cid, samples in history.items():
            chunk = samples[start:start + batch]
            if chunk:
                response = client.post(f"/api/v1/channels/{cid}/samples", json={"samples": chunk})
                assert response.status_code == 202, response.text
                assert response.json() == {"queued": len(chunk), "rejected": []}


def _write_csv(path: Path, history: dict[str, list[dict[str, Any]]]) -> None:
    """The same samples as a replay CSV, rows in the order they were posted; ``repr`` keeps every float exact."""

    def cell(value: float | None) -> str:
        return "" if value is None else repr(value)

    lines = ["t,channel,y,u,v,sigma"]
    longest = max(len(samples) for samples in history.values())
    for k in range(longest):
        for cid, samples in history.items():
            s = samples[k]
            row = [cell(s["t"]), cid, cell(s["y"]), cell(s["u"].get("u")), cell(s["u"].get("v")),
                   cell(s.get("sigma"))]
            lines.append(",".join(row))
    path.write_text("\n".join(lines) + "\n")


def _same_bits(actual: object, expected: object, where: str = "state") -> None:
    """Dataclass states equal field by field; arrays byte for byte (so -0.0 differs from 0.0)."""
    if is_dataclass(actual) and not isinstance(actual, type):
        assert type(actual) is type(expected), where
        for f in fields(actual):
            _same_bits(getattr(actual, f.name), getattr(expected, f.name), f"{where}.{f.name}")
    elif isinstance(actual, list | tuple):
        assert isinstance(expected, list | tuple) and len(actual) == len(expected), where
        for k, (a, b) in enumerate(zip(actual, expected, strict=True)):
            _same_bits(a, b, f"{where}[{k}]")
    elif isinstance(actual, np.ndarray):
        assert isinstance(expected, np.ndarray), where
        assert (actual.dtype, actual.shape) == (expected.dtype, expected.shape), where
        assert np.ascontiguousarray(actual).tobytes() == np.ascontiguousarray(expected).tobytes(), where
    else:
        assert actual == expected, where


def _estimator_states(runtime: Runtime) -> list[object]:
    """Every array the estimators of a runtime hold: per group the RWLS bank, noise tracker and model."""
    states: list[object] = []
    for group in runtime.engine.bank._groups:
        states.append(group.wls.state())
        states.append(group.tracker.state())
        states.append(None if group.model is None else group.model.state())
    return states


@pytest.fixture
def make_runtime(tmp_path: Path) -> Callable[..., Runtime]:
    """Factory ``make_runtime(name="store", queue_size=..., max_wait_ms=...)``: a Runtime without MQTT."""

    def make(name: str = "store", **engine: Any) -> Runtime:
        if "queue_size" in engine:
            engine.setdefault("max_batch", engine["queue_size"])
        return offline_runtime(CHANNELS, tmp_path / name, broker={"max_payload_bytes": MAX_PAYLOAD}, engine=engine,
                               auth=auth_section())

    return make


@pytest.fixture
def served(make_runtime: Callable[..., Runtime],
           serve: Callable[..., TestClient]) -> tuple[Runtime, TestClient]:
    """A started runtime (through the app's lifespan) and a client for its app, with the source token (reads
    and posts samples)."""
    runtime = make_runtime()
    return runtime, serve(runtime, SOURCE)


def _drain(runtime: Runtime) -> None:
    assert runtime.engine.drain(DRAIN_SECONDS), "engine did not drain in time"


# ------------------------------------------------------------------- views
def test_channels_lists_every_channel_bad_no_data_before_any_sample(served: tuple[Runtime, TestClient]) -> None:
    _, client = served
    response = client.get("/api/v1/channels")
    assert response.status_code == 200
    listed = _strict_json(response.text)
    assert [c["id"] for c in listed] == list(CHANNELS)
    for channel in listed:
        assert (channel["quality"], channel["quality_reason"]) == ("Bad", "no_data")
        assert (channel["samples"], channel["rejected"], channel["updated_at"], channel["t"]) == (0, 0, None, None)


def test_channels_turn_good_after_enough_samples(served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    history = _history(seed=11, n=60)
    _post_history(client, history)
    _drain(runtime)
    listed = {c["id"]: c for c in _strict_json(client.get("/api/v1/channels").text)}
    assert set(listed) == set(CHANNELS)
    for cid, channel in listed.items():
        assert (channel["quality"], channel["quality_reason"]) == ("Good", ""), cid
        assert channel["t"] == history[cid][-1]["t"]
        assert channel["updated_at"] is not None
    # o2's first sample only fills the y[-1] lag buffer.
    assert {cid: c["samples"] for cid, c in listed.items()} == {"flow": 60, "flow.b": 60, "temp": 60, "o2": 59}


def test_channel_detail_has_the_replay_report_fields_plus_identity(served: tuple[Runtime, TestClient],
                                                                    tmp_path: Path) -> None:
    runtime, client = served
    history = _history(seed=12, n=40)
    _post_history(client, history)
    _drain(runtime)
    csv_path = tmp_path / "history.csv"
    _write_csv(csv_path, history)
    replay_fields = set(replay_file(csv_path, runtime.config, show_progress=False).channels["temp"])
    assert replay_fields == REPORT_FIELDS
    detail = _strict_json(client.get("/api/v1/channels/temp").text)
    # replay lists the alarm transitions its detectors produced, the API the alarms' states now.
    assert set(detail) == REPORT_FIELDS | IDENTITY_FIELDS
    assert {a["kind"] for a in detail["alarms"]} == {"noise_level", "variance", "offset", "drift", "stale"}
    assert (detail["id"], detail["quality"], detail["quality_reason"]) == ("temp", "Good", "")
    assert detail["terms"] == ["1", "v"]
    assert set(detail["parameters"]) == set(detail["std_errors"]) == set(detail["intervals_95"]) == {"1", "v"}
    assert np.array(detail["covariance"]).shape == (2, 2)
    assert detail["t"] == history["temp"][-1]["t"]


def test_unknown_channel_is_404_unknown_channel(served: tuple[Runtime, TestClient]) -> None:
    _, client = served
    for response in (client.get("/api/v1/channels/nope"),
                     client.post("/api/v1/channels/nope/samples", json={"y": 1.0})):
        assert response.status_code == 404
        assert response.json() == {"detail": "unknown channel"}


@pytest.mark.parametrize("queued_before_start", [False, True], ids=["live", "one_micro_batch"])
def test_api_report_equals_replay_of_the_same_samples_bit_for_bit(make_runtime: Callable[..., Runtime],
                                                                  tmp_path: Path, queued_before_start: bool) -> None:
    # Live: micro-batches as timing makes them. Queued before the engine starts: every message lands in
    # one micro-batch, so "flow" and "flow.b" (one group) take the vectorised rounds, replay the scalar path.
    runtime = make_runtime()
    history = _history(seed=13, n=80)
    with api_client(create_app(runtime, manage_runtime=False), SOURCE) as client:
        if not queued_before_start:
            runtime.start()
        try:
            _post_history(client, history, batch=5)
            if queued_before_start:
                runtime.start()
            _drain(runtime)
            details = {cid: _strict_json(client.get(f"/api/v1/channels/{cid}").text) for cid in CHANNELS}
        finally:
            runtime.stop()
    if queued_before_start:
        assert runtime.engine.stats.batches == 1
    csv_path = tmp_path / "history.csv"
    _write_csv(csv_path, history)
    replayed = replay_file(csv_path, runtime.config, show_progress=False).to_json()["channels"]
    for cid, detail in details.items():
        assert detail["quality"] == "Good", cid
        # Same samples, same order per channel, same arithmetic: exact equality, no tolerance.
        assert detail["parameters"] == replayed[cid]["parameters"], cid
        # "alarms": states now in the API, transitions in replay; both empty of raised alarms here.
        same = REPORT_FIELDS - {"alarms"}
        assert {key: detail[key] for key in same} == {key: replayed[cid][key] for key in same}, cid
        assert replayed[cid]["alarms"] == [] and {a["state"] for a in detail["alarms"]} <= {
            "Normal", "Suppressed by design"}, cid


def test_no_response_carries_nan_or_infinity(served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    history = _history(seed=14, n=30)
    paths = ["/api/v1/channels", "/api/v1/snapshot", "/api/v1/health", "/api/v1/ready", "/openapi.json",
             *(f"/api/v1/channels/{cid}" for cid in CHANNELS)]
    # Before data, below the parameter count, at exactly the parameter count, and with plenty of data.
    for done, upto in ((0, 0), (0, 1), (1, 3), (3, 30)):
        if upto > done:
            _post_history(client, {cid: s[done:upto] for cid, s in history.items()})
            _drain(runtime)
        for path in paths:
            response = client.get(path)
            assert response.status_code == 200, path
            _strict_json(response.text)


def test_channel_with_too_few_samples_shows_null_parameters_and_is_not_good(
        served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    history = _history(seed=15, n=3)
    _post_history(client, {"flow": history["flow"][:2]})      # 2 samples for 3 parameters
    _drain(runtime)
    detail = _strict_json(client.get("/api/v1/channels/flow").text)
    assert detail["samples"] == 2
    assert detail["quality"] in ("Bad", "Uncertain")
    assert detail["parameters"] == {"1": None, "u": None, "u^2": None}
    assert detail["std_errors"] == {"1": None, "u": None, "u^2": None}
    assert detail["residual_sd"] is None
    snapshot = _strict_json(client.get("/api/v1/snapshot").text)
    assert snapshot["channels"]["flow"]["parameters"] == {"1": None, "u": None, "u^2": None}

    # At exactly as many samples as parameters there are numbers, but no degrees of freedom yet.
    _post_history(client, {"flow": history["flow"][2:3]})
    _drain(runtime)
    detail = _strict_json(client.get("/api/v1/channels/flow").text)
    assert (detail["quality"], detail["quality_reason"]) == ("Uncertain", "warming_up")
    assert all(math.isfinite(v) for v in detail["parameters"].values())
    assert detail["residual_sd"] is None


# ---------------------------------------------------------------- snapshot
def test_snapshot_has_every_channel_and_answers_304_to_its_etag(served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    first = client.get("/api/v1/snapshot")
    assert first.status_code == 200
    assert first.headers["content-type"].startswith("application/json")
    etag = first.headers["etag"]
    body = _strict_json(first.text)
    assert list(body["channels"]) == list(CHANNELS)
    assert body["version"] == 0

    again = client.get("/api/v1/snapshot", headers={"If-None-Match": etag})
    assert again.status_code == 304
    assert again.content == b""
    assert again.headers["etag"] == etag

    _post_history(client, _history(seed=16, n=20))
    _drain(runtime)
    changed = client.get("/api/v1/snapshot", headers={"If-None-Match": etag})
    assert changed.status_code == 200
    assert changed.headers["etag"] != etag
    body = _strict_json(changed.text)
    assert body["version"] > 0
    for cid in CHANNELS:
        detail = _strict_json(client.get(f"/api/v1/channels/{cid}").text)
        assert body["channels"][cid]["parameters"] == detail["parameters"], cid
        assert body["channels"][cid]["samples"] == detail["samples"], cid
    assert client.get("/api/v1/snapshot", headers={"If-None-Match": changed.headers["etag"]}).status_code == 304


def test_snapshot_etag_from_before_a_restart_does_not_match(make_runtime: Callable[..., Runtime]) -> None:
    history = _history(seed=21, n=2)["temp"]
    etags = []
    for sample in history:          # two processes in turn on one store, each reaching the same version
        runtime = make_runtime("restarted")
        with api_client(create_app(runtime), SOURCE) as client:
            assert client.post("/api/v1/channels/temp/samples", json=sample).status_code == 202
            _drain(runtime)
            if etags:
                # The version counter restarts with the process; an old ETag must not claim the new body.
                assert client.get("/api/v1/snapshot", headers={"If-None-Match": etags[0]}).status_code == 200
            etags.append(client.get("/api/v1/snapshot").headers["etag"])
    assert etags[0] != etags[1]


# ------------------------------------------------------------------ ingest
def test_post_single_and_batch_samples_is_202_with_queued_count(served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    history = _history(seed=17, n=5)["temp"]
    single = client.post("/api/v1/channels/temp/samples", json=history[0])
    assert single.status_code == 202
    assert single.json() == {"queued": 1, "rejected": []}
    batch = client.post("/api/v1/channels/temp/samples", json={"samples": history[1:]})
    assert batch.status_code == 202
    assert batch.json() == {"queued": 4, "rejected": []}
    _drain(runtime)
    assert runtime.engine.stats.samples_applied == 5
    assert runtime.engine.stats.refused == {}


@pytest.mark.parametrize(("body", "detail"), [
    (b'{"y": 1.0,', "malformed_json"),
    (b'{"y": NaN, "u": {"v": 1.0}}', "malformed_json"),
    (b"\xff\xfe", "bad_encoding"),
    (b"[1, 2]", "bad_structure"),
    (b'{"y": "1.0", "u": {"v": 1.0}}', "bad_type"),
    (b'{"y": 1.0}', "missing_input"),
])
def test_post_refused_message_is_400_with_its_reason_and_counted(served: tuple[Runtime, TestClient],
                                                                  body: bytes, detail: str) -> None:
    runtime, client = served
    response = client.post("/api/v1/channels/temp/samples", content=body,
                           headers={"content-type": "application/json"})
    assert response.status_code == 400
    assert response.json() == {"detail": detail}
    _drain(runtime)
    assert runtime.refusals() == {detail: 1}
    assert runtime.engine.stats.messages == 0      # refused at the door: the engine never saw it
    assert runtime.engine.stats.samples_applied == 0


def test_post_larger_than_max_payload_is_413(served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    big = json.dumps({"samples": [{"y": 1.0, "u": {"v": 1.0}}] * 400}).encode()
    assert len(big) > MAX_PAYLOAD
    declared = client.post("/api/v1/channels/temp/samples", content=big)
    assert declared.status_code == 413
    assert declared.json() == {"detail": "payload too large"}

    # Without a Content-Length (chunked) the body is cut off while it is read.
    chunks = (big[i:i + 1000] for i in range(0, len(big), 1000))
    streamed = client.post("/api/v1/channels/temp/samples", content=chunks)
    assert "content-length" not in streamed.request.headers
    assert streamed.status_code == 413
    assert streamed.json() == {"detail": "payload too large"}
    _drain(runtime)
    assert runtime.engine.stats.messages == 0      # never queued...
    assert runtime.engine.stats.samples_applied == 0
    assert runtime.refusals()["too_large"] == 2  # ...but counted, as over MQTT
    metrics = client.get("/metrics").text
    assert 'rwls_rejections_total{reason="too_large"} 2.0' in metrics


def test_post_to_an_unknown_channel_is_404_and_counted(served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    response = client.post("/api/v1/channels/nobody/samples", content=b'{"y": 1}')
    assert (response.status_code, response.json()) == (404, {"detail": "unknown channel"})
    assert runtime.refusals()["unknown_channel"] == 1


def _raw_post(app: FastAPI, path: str, headers: list[tuple[bytes, bytes]], body: bytes) -> tuple[int, bytes]:
    """One ASGI request with exactly these header bytes (an HTTP client would normalise them)."""
    scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST",
             "scheme": "http", "path": path, "raw_path": path.encode(), "query_string": b"", "root_path": "",
             "headers": [(b"host", b"testserver"), *headers], "client": ("127.0.0.1", 50000),
             "server": ("testserver", 80)}
    sent: list[dict[str, Any]] = []

    async def receive() -> dict[str, Any]:
        return {"type": "http.request", "body": body, "more_body": False}

    async def send(message: dict[str, Any]) -> None:
        sent.append(message)

    asyncio.run(app(scope, receive, send))
    status = next(m["status"] for m in sent if m["type"] == "http.response.start")
    return status, b"".join(m.get("body", b"") for m in sent if m["type"] == "http.response.body")


@pytest.mark.parametrize(("declared", "status"), [
    ("9" * 5000, 413),                  # beyond int()'s 4300-digit limit for a str
    ("1" + "0" * 30, 413),
    ("0" * 30 + "12", 202),             # leading zeros are still a small length (then the body decides)
    ("\u00b2", 202),                     # superscript two: str.isdigit() but not an int() literal; ignored
])
def test_content_length_that_is_no_plain_number_is_never_a_server_error(
        make_runtime: Callable[..., Runtime], declared: str, status: int) -> None:
    app = create_app(make_runtime(), manage_runtime=False)     # never started: an accepted body just queues
    token = bearer("source")["Authorization"].encode()
    answer = _raw_post(app, "/api/v1/channels/temp/samples",
                       [(b"authorization", token), (b"content-length", declared.encode("latin-1"))],
                       b'{"y": 1.0, "u": {"v": 2.0}}')
    assert answer[0] == status, answer


def _bad_samples(cid: str, good: dict[str, Any], earlier_t: float) -> list[dict[str, Any]]:
    """One sample per refusal the decoder makes, built from a good one."""
    name = INPUTS[cid][0]
    return [
        {**good, "y": HUGE},                            # non_finite: 1e400 reads as inf
        {**good, "y": True},                            # bad_type
        {**good, "sigma": -1.0},                        # bad_sigma
        {**good, "weight": 0.0},                        # bad_weight
        {**good, "colour": "red"},                      # unknown_field
        {key: v for key, v in good.items() if key != "y"},    # missing_field
        {**good, "u": {name + "_other": 1.0}},          # missing_input
        {**good, "t": "yesterday"},                     # bad_time
        {**good, "t": earlier_t, "seq": None},          # decodes; the channel refuses it: out_of_order
    ]


ROUNDS = 10
HUGE = "<1e400>"


def _dumps_huge(document: object) -> bytes:
    """JSON with every ``HUGE`` string written as the literal ``1e400`` (valid JSON, beyond float range)."""
    return json.dumps(document).replace(json.dumps(HUGE), "1e400").encode()

DECODER_REASONS = ["non_finite", "bad_type", "bad_sigma", "bad_weight", "unknown_field", "missing_field",
                   "missing_input", "bad_time"]


def test_bad_samples_are_listed_counted_and_leave_the_estimators_bit_identical(
        make_runtime: Callable[..., Runtime]) -> None:
    history = _history(seed=18, n=4 * ROUNDS)

    clean = make_runtime("clean")
    with api_client(create_app(clean), SOURCE) as client:
        _post_history(client, history, batch=4)
        _drain(clean)

    dirty = make_runtime("dirty")
    with api_client(create_app(dirty), SOURCE) as client:
        for start in range(0, 4 * ROUNDS, 4):
            for cid, samples in history.items():
                chunk = samples[start:start + 4]
                refused = _bad_samples(cid, chunk[0], earlier_t=chunk[0]["t"] - 3600.0)
                # Good samples keep their order; the bad ones sit between them.
                body = {"samples": [chunk[0], *refused, *chunk[1:]]}
                response = client.post(f"/api/v1/channels/{cid}/samples", content=_dumps_huge(body))
                assert response.status_code == 202, response.text
                listed = response.json()
                assert listed["queued"] == len(chunk) + 1       # the out-of-order sample decodes
                assert listed["rejected"] == [{"index": 1 + k, "reason": reason}
                                              for k, reason in enumerate(DECODER_REASONS)]
                # Whole-message refusals and a redelivered seq.
                assert client.post(f"/api/v1/channels/{cid}/samples", content=b"{").status_code == 400
                assert client.post(f"/api/v1/channels/{cid}/samples", json=chunk[-1]).status_code == 202
        _drain(dirty)

        per_reason = ROUNDS * len(CHANNELS)      # each refusal once per channel and round
        assert dirty.refusals() == {
            **dict.fromkeys(DECODER_REASONS, per_reason), "out_of_order": per_reason,
            "malformed_json": per_reason, "duplicate_seq": per_reason}
        assert dirty.engine.stats.messages == 2 * per_reason     # the malformed ones never reach it
        metrics = client.get("/metrics").text
        assert f'rwls_rejections_total{{reason="duplicate_seq"}} {float(per_reason)}' in metrics

    assert dirty.engine.stats.samples_applied == clean.engine.stats.samples_applied
    assert dirty.engine.stats.samples_warmup == clean.engine.stats.samples_warmup
    dirty_views, clean_views = dirty.engine.bank.view(), clean.engine.bank.view()
    for cid in CHANNELS:
        d, c = dirty_views[cid], clean_views[cid]
        assert d.parameters.tobytes() == c.parameters.tobytes(), cid
        assert d.covariance.tobytes() == c.covariance.tobytes(), cid
        assert (d.applied, d.warmup, d.last_t) == (c.applied, c.warmup, c.last_t), cid
        assert (d.noise_sigma, d.residual_sd) == (c.noise_sigma, c.residual_sd), cid
        # Decoder refusals never reach a channel; its own checks refused the out-of-order samples
        # (and, where the bank checks seq, the redeliveries).
        assert d.refused["out_of_order"] == ROUNDS, cid
        assert set(d.refused) <= {"out_of_order", "duplicate_seq"}, cid
    _same_bits(_estimator_states(dirty), _estimator_states(clean))


def test_full_queue_is_503_with_retry_after_and_nothing_is_lost(make_runtime: Callable[..., Runtime]) -> None:
    runtime = make_runtime(queue_size=1)
    samples = _history(seed=19, n=2)["temp"]
    with api_client(create_app(runtime, manage_runtime=False), SOURCE) as client:   # the engine is not started
        assert client.post("/api/v1/channels/temp/samples", json=samples[0]).status_code == 202
        busy = client.post("/api/v1/channels/temp/samples", json=samples[1])
        assert busy.status_code == 503
        assert busy.headers["retry-after"] == "1"
        assert busy.json() == {"detail": "busy, retry later"}
        assert client.get("/api/v1/health").status_code == 503
        ready = client.get("/api/v1/ready")
        assert ready.status_code == 503
        assert _strict_json(ready.text)["queue_depth"] == 1
        assert "rwls_queue_depth 1.0" in client.get("/metrics").text

        runtime.start()
        try:
            _drain(runtime)
            assert client.post("/api/v1/channels/temp/samples", json=samples[1]).status_code == 202
            _drain(runtime)
        finally:
            runtime.stop()
    assert runtime.engine.stats.samples_applied == 2
    assert runtime.engine.snapshot.channels["temp"].view.applied == 2


# ---------------------------------------------------------------- history
def test_history_is_downsampled_filtered_and_survives_a_restart(tmp_path: Path) -> None:
    config = offline_config(CHANNELS, tmp_path / "h", store_options={"history_step": 600.0}, auth=auth_section())
    history = _history(seed=5, n=120)                  # samples 60 s apart: two hours
    runtime = Runtime(config, mqtt=False)
    with api_client(create_app(runtime), SOURCE) as client:
        _post_history(client, history, batch=4)
        _drain(runtime)
        live = _strict_json(client.get("/api/v1/channels/flow/history").text)
        assert client.get("/api/v1/channels/nope/history").status_code == 404
        assert client.get("/api/v1/channels/flow/history", params={"limit": 0}).status_code == 422
    rows = live["rows"]
    assert (live["channel"], live["terms"], live["step"]) == ("flow", ["1", "u", "u^2"], 600.0)
    times = [row["t"] for row in rows]
    assert len(rows) >= 5 and times == sorted(times)
    assert all(b - a >= 600.0 for a, b in itertools.pairwise(times))
    assert {"parameters", "std_errors", "noise_sigma", "residual_sd", "quality", "samples", "detectors"} <= set(rows[0])
    assert [row["samples"] for row in rows] == sorted(row["samples"] for row in rows)
    assert rows[-1]["parameters"] == pytest.approx([1.0, 0.6, 0.4], abs=0.2)

    again = Runtime(config, mqtt=False)                # rows come back from the store after a restart
    with api_client(create_app(again), SOURCE) as client:
        stored = _strict_json(client.get("/api/v1/channels/flow/history").text)["rows"]
        assert stored == rows
        middle = _strict_json(client.get("/api/v1/channels/flow/history",
                                         params={"since": times[1], "until": times[3]}).text)["rows"]
        assert [row["t"] for row in middle] == times[1:4]
        newest = _strict_json(client.get("/api/v1/channels/flow/history", params={"limit": 2}).text)["rows"]
        assert [row["t"] for row in newest] == times[-2:]


# -------------------------------------------------------- health, metrics
def test_health_and_ready_are_200_while_the_engine_runs(served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    health = client.get("/api/v1/health")
    assert (health.status_code, health.json()) == (200, {"status": "ok"})
    ready = client.get("/api/v1/ready")
    assert ready.status_code == 200
    state = _strict_json(ready.text)
    assert (state["ready"], state["engine_alive"], state["broker"]) == (True, True, None)

    runtime.engine.stop()
    down = client.get("/api/v1/health")
    assert (down.status_code, down.json()) == (503, {"detail": "engine or ingest thread down"})
    assert client.get("/api/v1/ready").status_code == 503


def test_metrics_are_prometheus_text_with_applied_rejections_and_queue_depth(
        served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    _post_history(client, {"temp": _history(seed=20, n=3)["temp"]})
    client.post("/api/v1/channels/temp/samples", content=b"not json")
    _drain(runtime)
    response = client.get("/metrics")
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/plain; version=0.0.4")
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for family in text_string_to_metric_families(response.text) for s in family.samples}
    assert samples[("rwls_samples_applied_total", ())] == 3.0
    assert samples[("rwls_rejections_total", (("reason", "malformed_json"),))] == 1.0
    assert samples[("rwls_queue_depth", ())] == 0.0
    assert samples[("rwls_channels", (("quality", "Bad"),))] == 3.0


# ------------------------------------------------------------------ errors
def test_invalid_path_or_query_parameter_is_422_naming_each_field(make_runtime: Callable[..., Runtime]) -> None:
    app = create_app(make_runtime())

    # No shipped endpoint has a typed parameter, so a probe route exercises the app's validation handler.
    @app.get("/api/v1/probe/{number}")
    def probe(number: int, limit: int = 10) -> dict[str, int]:
        return {"number": number, "limit": limit}

    with api_client(app, SOURCE) as client:
        assert client.get("/api/v1/probe/3?limit=4").json() == {"number": 3, "limit": 4}
        expected = {
            "/api/v1/probe/three": {"detail": "invalid path parameter number: must be an integer",
                                    "errors": [{"field": "path.number", "problem": "must be an integer"}]},
            "/api/v1/probe/3?limit=many": {"detail": "invalid query parameter limit: must be an integer",
                                           "errors": [{"field": "query.limit", "problem": "must be an integer"}]},
            "/api/v1/probe/x?limit=y": {"detail": "invalid path parameter number: must be an integer (and 1 more)",
                                        "errors": [{"field": "path.number", "problem": "must be an integer"},
                                                   {"field": "query.limit", "problem": "must be an integer"}]},
        }
        for path, body in expected.items():
            response = client.get(path)
            assert response.status_code == 422
            assert response.json() == body


def test_a_422_names_the_field_and_the_problem_never_the_value(make_runtime: Callable[..., Runtime]) -> None:
    with api_client(create_app(make_runtime()), SOURCE) as client:
        response = client.get("/api/v1/channels/flow/history", params={"limit": 0})
        assert response.status_code == 422
        assert response.json() == {"detail": "invalid query parameter limit: must be at least 1",
                                   "errors": [{"field": "query.limit", "problem": "must be at least 1"}]}
        secret = "s3cr3t-value-" * 3
        response = client.get("/api/v1/channels/flow/history", params={"since": secret})
        assert response.status_code == 422 and secret not in response.text
        assert response.json()["errors"] == [{"field": "query.since", "problem": "must be a number"}]


def test_unhandled_error_is_500_internal_error_without_traceback(make_runtime: Callable[..., Runtime]) -> None:
    app = create_app(make_runtime())

    @app.get("/api/v1/explode")
    def explode() -> None:
        raise RuntimeError("secret internals")

    with api_client(app, SOURCE, raise_server_exceptions=False) as client:
        response = client.get("/api/v1/explode")
    assert response.status_code == 500
    assert response.json() == {"detail": "internal error"}
    assert "secret" not in response.text and "Traceback" not in response.text


def test_unknown_route_and_method_give_short_json(served: tuple[Runtime, TestClient]) -> None:
    _, client = served
    assert (client.get("/api/v1/nothing").status_code, client.get("/api/v1/nothing").json()) \
        == (404, {"detail": "Not Found"})
    wrong = client.delete("/api/v1/channels")
    assert (wrong.status_code, wrong.json()) == (405, {"detail": "Method Not Allowed"})


# ------------------------------------------------------------ docs, lock
def test_openapi_lists_the_endpoints_and_docs_serve_html(served: tuple[Runtime, TestClient]) -> None:
    _, client = served
    spec = _strict_json(client.get("/openapi.json").text)
    assert spec["paths"].keys() == {
        "/api/v1/channels", "/api/v1/channels/{channel_id}", "/api/v1/channels/{channel_id}/samples",
        "/api/v1/channels/{channel_id}/history",
        "/api/v1/snapshot", "/api/v1/health", "/api/v1/ready", "/api/v1/alarms", "/api/v1/alarms/journal",
        *(f"/api/v1/alarms/{{alarm_id}}/{action}" for action in ("ack", "shelve", "unshelve", "remove", "restore")),
        "/api/v1/channels/{channel_id}/baseline", "/api/v1/channels/{channel_id}/baselines",
        "/api/v1/channels/{channel_id}/reset", "/api/v1/events"}
    assert set(spec["paths"]["/api/v1/channels/{channel_id}/samples"]) == {"post"}
    docs = client.get("/docs")
    assert docs.status_code == 200
    assert docs.headers["content-type"].startswith("text/html")
    assert "/openapi.json" in docs.text


def test_docs_page_names_only_its_own_origin_and_allows_its_inline_script_by_hash(
        served: tuple[Runtime, TestClient]) -> None:
    _, client = served
    docs = client.get("/docs")
    policy = docs.headers["content-security-policy"]
    assert "unsafe-inline" not in policy and "http" not in policy
    assert "https://" not in docs.text and "http://" not in docs.text        # no CDN, no favicon from elsewhere
    inline = re.findall(r"<script>(.*?)</script>", docs.text, re.DOTALL)
    assert len(inline) == 1
    digest = base64.b64encode(hashlib.sha256(inline[0].encode()).digest()).decode()
    assert f"'sha256-{digest}'" in policy
    assert "Advisory use only." in docs.text
    for name, kind in (("swagger-ui-bundle.js", "text/javascript"), ("swagger-ui.css", "text/css"),
                       ("LICENSE", "text/plain")):
        asset = client.get(f"/docs/assets/{name}")
        assert asset.status_code == 200 and asset.headers["content-type"].startswith(kind), name
    assert "Apache License" in client.get("/docs/assets/LICENSE").text
    assert client.get("/docs/assets/index.css").status_code == 404       # only the files the page needs
    assert client.get("/redoc").status_code == 404


def test_second_runtime_on_the_same_store_fails_with_already_running(
        make_runtime: Callable[..., Runtime]) -> None:
    first = make_runtime("shared")
    second = make_runtime("shared")
    with api_client(create_app(first), SOURCE):
        with pytest.raises(AlreadyRunning, match="another rwls process owns ingest"):
            second.start()
        assert not second.engine_alive()
        with pytest.raises(AlreadyRunning), api_client(create_app(second), SOURCE):
            pass
    # Once the owner stops, the lock is free.
    second.start()
    try:
        assert second.engine.alive()
    finally:
        second.stop()


def test_while_the_input_log_cannot_be_written_http_ingest_is_503_and_ready_says_why(
        served: tuple[Runtime, TestClient]) -> None:
    runtime, client = served
    sample = _history(seed=19, n=1)["temp"][0]
    runtime.faults.failed(FaultPart.INPUT_LOG, OSError(28, "No space left on device"))
    refused = client.post("/api/v1/channels/temp/samples", json=sample)
    assert refused.status_code == 503
    assert int(refused.headers["Retry-After"]) > 0
    assert "input log cannot be written" in refused.json()["detail"]
    ready = client.get("/api/v1/ready")
    assert ready.status_code == 503
    assert [(f["part"], f["attempts"]) for f in ready.json()["faults"]] == [("input_log", 1)]
    assert 'rwls_host_fault{part="input_log"} 1.0' in client.get("/metrics").text
    runtime.faults.cleared(FaultPart.INPUT_LOG)
    assert client.post("/api/v1/channels/temp/samples", json=sample).status_code == 202
    assert client.get("/api/v1/ready").json()["faults"] == []
