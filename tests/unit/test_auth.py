"""Access control in-process: tokens and roles on every route, 401 against 403, no token in logs, CORS, body limits."""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from service.api.app import create_app
from service.api.auth import PERMISSIONS, Access, new_token, token_digest
from service.config.settings import ConfigError, load_config, parse_config
from service.config.token_settings import AuthConfig
from service.runtime import Runtime
from tests.support.auth_tokens import TOKENS, auth_section, bearer
from tests.support.clients import api_client
from tests.support.runtimes import offline_runtime

CHANNELS = {"dp": {"terms": ["1", "u"], "detectors": {"commissioning_samples": 20}}}
SAMPLE = b'{"t": 1.0, "y": 1.0, "u": {"u": 0.5}, "seq": 1}'

# Every write route and the permission it needs, stated here rather than read back from the app.
WRITES: list[tuple[str, dict[str, Any], str]] = [
    ("/api/v1/channels/dp/samples", {"content": SAMPLE}, "ingest"),
    ("/api/v1/alarms/dp:offset/ack", {"json": {}}, "operate"),
    ("/api/v1/alarms/dp:offset/shelve", {"json": {"minutes": 5}}, "operate"),
    ("/api/v1/alarms/dp:offset/unshelve", {"json": {}}, "operate"),
    ("/api/v1/alarms/dp:offset/remove", {"json": {}}, "operate"),
    ("/api/v1/alarms/dp:offset/restore", {"json": {}}, "operate"),
    ("/api/v1/channels/dp/baseline", {"json": {}}, "configure"),
    ("/api/v1/channels/dp/reset", {"json": {}}, "configure"),
]
READS = ["/api/v1/channels", "/api/v1/channels/dp", "/api/v1/channels/dp/history", "/api/v1/snapshot",
         "/api/v1/alarms", "/api/v1/alarms/journal", "/api/v1/channels/dp/baselines", "/metrics"]
ALWAYS_OPEN = ["/api/v1/health", "/api/v1/ready", "/openapi.json", "/"]
ROLE_GRANTS = {"viewer": {"read"}, "source": {"read", "ingest"}, "operator": {"read", "operate"},
               "engineer": {"read", "ingest", "operate", "configure"}}


# Clients here carry no token of their own: each request says whose it is.
@pytest.fixture
def served(tmp_path: Path, serve: Callable[..., Any]) -> tuple[Runtime, Any]:
    runtime = offline_runtime(CHANNELS, tmp_path / "open", auth=auth_section())
    return runtime, serve(runtime)


@pytest.fixture
def closed(tmp_path: Path, serve: Callable[..., Any]) -> tuple[Runtime, Any]:
    runtime = offline_runtime(CHANNELS, tmp_path / "closed", auth=auth_section(reads="token"))
    return runtime, serve(runtime)


# ------------------------------------------------------------ the checks
def test_the_documented_permissions_are_the_ones_in_force() -> None:
    assert {role: set(granted) for role, granted in PERMISSIONS.items()} == ROLE_GRANTS


def test_verify_finds_the_holder_and_refuses_anything_else() -> None:
    tokens = {"a": new_token(), "b": new_token()}
    access = Access(AuthConfig(tokens=tuple(
        {"name": name, "role": "viewer", "sha256": token_digest(t)} for name, t in tokens.items())))  # type: ignore[misc]
    assert access.verify(tokens["a"]).name == "a"        # type: ignore[union-attr]
    assert access.verify(tokens["b"]).name == "b"        # type: ignore[union-attr]
    for wrong in ("", tokens["a"][:-1], tokens["a"] + "x", token_digest(tokens["a"]), "\udcff", "x" * 10_000):
        assert access.verify(wrong) is None


def test_sha256_of_a_known_string() -> None:
    # FIPS 180-2, appendix B.1: SHA-256("abc")
    assert token_digest("abc") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_new_tokens_are_long_random_and_distinct() -> None:
    made = {new_token() for _ in range(100)}
    assert len(made) == 100 and all(t.startswith("rwls_") and len(t) >= 45 for t in made)


# ---------------------------------------------------------------- writes
def test_a_write_without_a_token_is_401_with_a_bearer_challenge(served: tuple[Runtime, Any]) -> None:
    runtime, client = served
    for path, body, _ in WRITES:
        response = client.post(path, **body)
        assert response.status_code == 401, path
        assert response.headers["www-authenticate"] == "Bearer"
        assert response.json() == {"detail": "token required"}
    assert runtime.engine.drain(5.0) and runtime.engine.stats.samples_applied == 0


def test_a_wrong_token_is_401_invalid_token_on_reads_and_writes(served: tuple[Runtime, Any]) -> None:
    _, client = served
    wrong = {"Authorization": f"Bearer {new_token()}"}
    for path in ["/api/v1/channels", WRITES[1][0]]:
        response = client.post(path, json={}, headers=wrong) if "ack" in path else client.get(path, headers=wrong)
        assert response.status_code == 401, path
        assert response.headers["www-authenticate"] == 'Bearer error="invalid_token"'
    basic = client.post(WRITES[1][0], json={}, headers={"Authorization": "Basic dXNlcjpwYXNz"})
    assert basic.status_code == 401                    # not a bearer token: no token at all


@pytest.mark.parametrize("role", list(ROLE_GRANTS))
def test_each_role_may_do_what_it_is_granted_and_gets_403_for_the_rest(served: tuple[Runtime, Any],
                                                                        role: str) -> None:
    _, client = served
    for path, body, permission in WRITES:
        response = client.post(path, headers=bearer(role), **body)
        if permission in ROLE_GRANTS[role]:
            # Past the door: whatever the route answers (a refused transition, no estimates yet), not 401/403.
            assert response.status_code not in (401, 403), (role, path, response.text)
        else:
            assert response.status_code == 403, (role, path)
            assert response.json()["detail"].startswith(f"forbidden: {permission} needs the role")


def test_no_tokens_configured_means_no_writes_at_all(tmp_path: Path) -> None:
    with api_client(create_app(offline_runtime(CHANNELS, tmp_path / "none"))) as client:
        assert client.get("/api/v1/channels").status_code == 200
        for path, body, _ in WRITES:
            assert client.post(path, **body).status_code == 401, path


def test_the_journal_names_the_token_holder(served: tuple[Runtime, Any]) -> None:
    _, client = served
    removed = client.post("/api/v1/alarms/dp:offset/remove", json={"comment": "transmitter swapped"},
                          headers=bearer("operator"))
    assert removed.status_code == 200, removed.text
    restored = client.post("/api/v1/alarms/dp:offset/restore", json={"user": "ana"}, headers=bearer("engineer"))
    assert restored.status_code == 200, restored.text
    journal = client.get("/api/v1/alarms/journal", params={"channel": "dp"}).json()["entries"]
    assert [(e["action"], e["user"]) for e in journal if e["alarm"] == "dp:offset"][-2:] == [
        ("remove", "test-operator"), ("restore", "ana via test-engineer")]
    reset = client.post("/api/v1/channels/dp/reset", json={}, headers=bearer("engineer"))
    assert reset.status_code == 200 and reset.json()["by"] == "test-engineer"


# ----------------------------------------------------------------- reads
def test_reads_are_open_by_default_and_need_a_token_when_configured(served: tuple[Runtime, Any],
                                                                    closed: tuple[Runtime, Any]) -> None:
    _, open_client = served
    _, closed_client = closed
    for path in READS:
        assert open_client.get(path).status_code == 200, path
        assert closed_client.get(path).status_code == 401, path
        assert closed_client.get(path, headers=bearer("viewer")).status_code == 200, path
    for path in ALWAYS_OPEN:                           # probes and the schema need no token
        assert closed_client.get(path).status_code == 200, path


def test_no_token_reaches_the_logs(served: tuple[Runtime, Any], caplog: pytest.LogCaptureFixture) -> None:
    _, client = served
    stranger = new_token()
    with caplog.at_level(logging.DEBUG):
        client.get("/api/v1/channels", headers={"Authorization": f"Bearer {stranger}"})
        for role in TOKENS:
            for path, body, _ in WRITES:
                client.post(path, headers=bearer(role), **body)
    logged = "\n".join(f"{r.getMessage()} {r.args!r} {r.exc_text or ''}" for r in caplog.records)
    assert caplog.records                              # the requests did log (otherwise this proves nothing)
    for secret in (stranger, *TOKENS.values()):
        assert secret not in logged


# ------------------------------------------------------- configuration
def test_token_configuration_is_checked_by_key(tmp_path: Path) -> None:
    bad = [({"tokens": [{"name": "a", "role": "viewer", "sha256": "abc"}]}, "auth.tokens[0].sha256"),
           ({"tokens": [{"name": "a", "role": "root", "sha256": "a" * 64}]}, "auth.tokens[0].role"),
           ({"tokens": [{"name": "a b", "role": "viewer", "sha256": "a" * 64}]}, "auth.tokens[0].name"),
           ({"tokens": [{"name": "a", "role": "viewer", "sha256": "a" * 64},
                        {"name": "a", "role": "engineer", "sha256": "b" * 64}]}, "auth.tokens"),
           ({"reads": "maybe"}, "auth.reads")]
    for section, key in bad:
        with pytest.raises(ConfigError) as caught:
            parse_config({"channels": CHANNELS, "auth": section})
        assert any(p.startswith(key) for p in caught.value.problems), (key, caught.value.problems)


def test_tokens_can_come_from_the_environment(tmp_path: Path) -> None:
    path = tmp_path / "rwls.toml"
    path.write_text('[channels.dp]\nterms = ["1", "u"]\n')
    digest = token_digest(TOKENS["operator"])
    config = load_config(path, {"RWLS_AUTH__TOKENS": f'[{{name = "scada", role = "operator", sha256 = "{digest}"}}]',
                                "RWLS_AUTH__READS": "token"})
    assert config.auth.reads == "token"
    assert Access(config.auth).verify(TOKENS["operator"]).name == "scada"  # type: ignore[union-attr]


# ------------------------------------------------------------ CORS, sizes
def test_cors_is_off_by_default_and_allows_only_the_configured_origins(served: tuple[Runtime, Any],
                                                                       tmp_path: Path) -> None:
    _, client = served
    plain = client.get("/api/v1/channels", headers={"Origin": "http://evil.example"})
    assert "access-control-allow-origin" not in plain.headers
    with api_client(create_app(offline_runtime(CHANNELS, tmp_path / "cors", auth=auth_section(),
                                              http={"cors_origins": ["http://hmi.plant.example:8443"]}))) as allowing:
        ours = allowing.get("/api/v1/channels", headers={"Origin": "http://hmi.plant.example:8443"})
        assert ours.headers["access-control-allow-origin"] == "http://hmi.plant.example:8443"
        theirs = allowing.get("/api/v1/channels", headers={"Origin": "http://evil.example"})
        assert "access-control-allow-origin" not in theirs.headers
        preflight = allowing.options("/api/v1/alarms/dp:offset/ack", headers={
            "Origin": "http://hmi.plant.example:8443", "Access-Control-Request-Method": "POST",
            "Access-Control-Request-Headers": "authorization, content-type"})
        assert preflight.status_code == 200
        assert "authorization" in preflight.headers["access-control-allow-headers"].lower()
    with pytest.raises(ConfigError, match=r"http\.cors_origins"):
        parse_config({"channels": CHANNELS, "http": {"cors_origins": ["*"]}})


def test_request_bodies_above_the_limit_are_413_declared_or_streamed(served: tuple[Runtime, Any]) -> None:
    _, client = served
    limit = 65536                                       # http.max_body_bytes, default
    big = b'{"comment": "' + b"x" * limit + b'"}'
    declared = client.post("/api/v1/alarms/dp:offset/ack", content=big, headers={
        **bearer("operator"), "Content-Type": "application/json"})
    assert (declared.status_code, declared.json()) == (413, {"detail": "payload too large"})

    def chunks() -> Iterator[bytes]:                  # no Content-Length: the body arrives chunked
        for start in range(0, len(big), 4096):
            yield big[start:start + 4096]

    streamed = client.post("/api/v1/alarms/dp:offset/ack", content=chunks(), headers={
        **bearer("operator"), "Content-Type": "application/json"})
    assert (streamed.status_code, streamed.json()) == (413, {"detail": "payload too large"})
    fits = client.post("/api/v1/alarms/dp:offset/ack", json={"comment": "x" * 100}, headers=bearer("operator"))
    assert fits.status_code in (404, 409)             # past the limit check: the alarm's own answer
