"""Security headers on every response: every route of the OpenAPI document (its paths and methods read from
the app's own schema, each answered as a reader, a writer and a stranger would be answered), the pages outside
the schema, refusals and errors; HSTS only over HTTPS; the dashboard and /docs keep their own strict policy."""

from __future__ import annotations

import re
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pytest
from httpx import Headers

from service.api.app import create_app
from service.api.security_headers import BASELINE_HEADERS
from service.runtime import Runtime
from tests.support.auth_tokens import auth_section, bearer
from tests.support.clients import api_client
from tests.support.runtimes import offline_runtime

if TYPE_CHECKING:
    from fastapi.testclient import TestClient

CHANNELS = {"dp": {"terms": ["1", "u"], "detectors": {"commissioning_samples": 20}}}
SAMPLE = b'{"t": 1.0, "y": 1.0, "u": {"u": 0.5}, "seq": 1}'
PARAMETERS = {"channel_id": "dp", "alarm_id": "dp:offset"}
OUTSIDE_SCHEMA = ["/", "/docs", "/openapi.json", "/metrics", "/ui/app.js", "/no/such/route"]
HSTS = "max-age=31536000"


def _assert_secure(headers: Headers, what: str, *, https: bool) -> None:
    for name in ("X-Content-Type-Options", "X-Frame-Options", "Referrer-Policy", "Content-Security-Policy"):
        assert name in headers, f"{what}: {name} missing"
    assert headers["x-content-type-options"] == "nosniff", what
    assert headers["x-frame-options"] == "DENY", what
    assert headers["referrer-policy"] == "no-referrer", what
    assert "frame-ancestors 'none'" in headers["content-security-policy"], what
    assert headers.get("strict-transport-security") == (HSTS if https else None), what


def _event_stream_headers(client: TestClient, runtime: Runtime, **options: object) -> Headers:
    """The headers of an open event stream, read in a thread; the stream ends as shutdown ends it."""
    found: list[Headers] = []

    def listen() -> None:
        with client.stream("GET", "/api/v1/events", **options) as response:  # type: ignore[arg-type]
            found.append(response.headers)
            for _ in response.iter_lines():
                pass

    reader = threading.Thread(target=listen, daemon=True)
    reader.start()
    deadline = time.monotonic() + 10.0
    while not found and time.monotonic() < deadline:
        time.sleep(0.02)
    runtime.events.close()
    reader.join(10.0)
    assert found and not reader.is_alive()
    return found[0]


@pytest.fixture(params=["http", "https"])
def served(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[tuple[Runtime, TestClient, bool]]:
    runtime = offline_runtime(CHANNELS, tmp_path / "store", auth=auth_section())
    https = request.param == "https"
    with api_client(create_app(runtime), base_url=f"{request.param}://testserver",
                    raise_server_exceptions=False) as client:
        yield runtime, client, https


def test_every_route_of_the_schema_answers_with_the_security_headers(
        served: tuple[Runtime, TestClient, bool]) -> None:
    runtime, client, https = served
    paths = client.get("/openapi.json").json()["paths"]
    checked = 0
    for template, operations in paths.items():
        path = re.sub(r"\{(\w+)\}", lambda m: PARAMETERS[m.group(1)], template)
        for method in operations:
            if path == "/api/v1/events":
                continue                               # a stream that never ends by itself: below
            body = {"content": SAMPLE} if path.endswith("/samples") else {"json": {}}
            options = {} if method == "get" else body
            for headers in ({}, bearer("engineer"), {"Authorization": "Bearer rwls_wrong"}):
                response = client.request(method.upper(), path, headers=headers, **options)  # type: ignore[arg-type]
                _assert_secure(response.headers, f"{method.upper()} {path} -> {response.status_code}", https=https)
                checked += 1
    assert checked >= 3 * 17                           # every operation of the document, three ways
    _assert_secure(_event_stream_headers(client, runtime), "GET /api/v1/events", https=https)


def test_pages_outside_the_schema_refusals_and_errors_carry_them_too(
        served: tuple[Runtime, TestClient, bool]) -> None:
    _, client, https = served
    for path in OUTSIDE_SCHEMA:
        response = client.get(path)
        _assert_secure(response.headers, f"GET {path} -> {response.status_code}", https=https)
    for response in (client.delete("/api/v1/channels"),                                   # 405
                     client.post("/api/v1/channels/dp/reset", json={}),                    # 401
                     client.post("/api/v1/channels/dp/reset", content=b"x" * 200_000,      # 413
                                 headers=bearer("engineer"))):
        _assert_secure(response.headers, f"refusal {response.status_code}", https=https)
    metrics = client.get("/metrics").text
    assert 'rwls_http_refused_total{reason="body_too_large"} 1.0' in metrics
    assert 'rwls_http_limit{name="max_body_bytes"} 65536.0' in metrics


def test_an_internal_error_carries_the_headers(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    runtime = offline_runtime(CHANNELS, tmp_path / "store", auth=auth_section())

    def broken() -> dict[str, object]:
        raise RuntimeError("a fault inside a handler")

    with api_client(create_app(runtime), raise_server_exceptions=False) as client:
        monkeypatch.setattr(runtime, "readiness", broken)
        response = client.get("/api/v1/ready")
    assert response.status_code == 500
    _assert_secure(response.headers, "500", https=False)


def test_the_dashboard_and_the_docs_keep_their_own_strict_policy(
        served: tuple[Runtime, TestClient, bool]) -> None:
    _, client, _ = served
    for path in ("/", "/docs"):
        policy = client.get(path).headers["content-security-policy"]
        assert policy != BASELINE_HEADERS["Content-Security-Policy"]
        assert "script-src 'self'" in policy and "unsafe-inline" not in policy, path
