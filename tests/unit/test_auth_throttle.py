"""Throttled guessing and tokens that end: 429 with a growing Retry-After after repeated wrong tokens from one
client address while another address is served; an expired token refused saying so; /ready naming the tokens
that end soon; `rwls token --expires` writing the end into the entry."""

from __future__ import annotations

import logging
import tomllib
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from service.api.app import create_app
from service.api.auth import new_token, token_digest
from service.api.throttle import AuthThrottle
from service.cli import main, token_end
from service.config.settings import ConfigError, parse_config
from service.runtime import Runtime
from tests.support.auth_tokens import TOKENS, auth_section, bearer
from tests.support.clients import api_client
from tests.support.runtimes import offline_runtime

if TYPE_CHECKING:
    from fastapi.testclient import TestClient

CHANNELS = {"dp": {"terms": ["1", "u"], "detectors": {"commissioning_samples": 20}}}
GUESSER = ("192.0.2.7", 40000)           # RFC 5737 documentation addresses
NEIGHBOUR = ("192.0.2.8", 40001)
WRONG = {"Authorization": "Bearer rwls_" + "A" * 43}
HTTP = {"auth_failures": 3, "auth_window": 60.0, "auth_block_seconds": 2.0, "auth_block_max_seconds": 8.0}


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


# ------------------------------------------------------------ the throttle alone
def test_a_block_begins_after_the_allowed_failures_and_doubles_on_each_repeat_up_to_the_longest() -> None:
    clock = Clock()
    throttle = AuthThrottle(3, 60.0, 2.0, 8.0, clock=clock)
    waits = []
    for _ in range(5):
        for _ in range(3):
            assert throttle.retry_after("a") is None
            throttle.failed("a")
        wait = throttle.retry_after("a")
        assert wait is not None
        waits.append(wait)
        clock.now += wait                      # the block ends; the guesser tries again at once
    assert waits == [2.0, 4.0, 8.0, 8.0, 8.0]
    assert throttle.retry_after("b") is None and throttle.blocks_total == 5 and throttle.failed_total == 15


def test_failures_spread_beyond_the_window_never_block_and_a_quiet_address_is_forgiven() -> None:
    clock = Clock()
    throttle = AuthThrottle(3, 60.0, 2.0, 8.0, clock=clock)
    for _ in range(10):
        throttle.failed("a")
        clock.now += 31.0                      # two failures per window at most
    assert throttle.retry_after("a") is None and throttle.blocks_total == 0
    for _ in range(3):
        throttle.failed("a")
    assert throttle.retry_after("a") == 2.0
    clock.now += 2.0 + 8.0 + 1.0               # longer than the longest block without a failure
    for _ in range(3):
        throttle.failed("a")
    assert throttle.retry_after("a") == 2.0    # the first block's length again


def test_the_table_of_addresses_is_bounded() -> None:
    throttle = AuthThrottle(3, 60.0, 2.0, 8.0, clock=Clock(), max_addresses=100)
    for k in range(1000):
        throttle.failed(f"10.0.{k // 256}.{k % 256}")
    assert len(throttle._addresses) == 100


# ------------------------------------------------------------ through the app
@pytest.fixture
def runtime(tmp_path: Path) -> Runtime:
    return offline_runtime(CHANNELS, tmp_path / "store", auth=auth_section(), http=HTTP)


@pytest.fixture
def clients(runtime: Runtime) -> Iterator[tuple[TestClient, TestClient]]:
    app = create_app(runtime)
    # One app, so one throttle; the first client runs its lifespan (the runtime), the second only sends.
    with api_client(app, client=GUESSER) as guesser:
        yield guesser, api_client(app, client=NEIGHBOUR, role="engineer")


def test_repeated_wrong_tokens_from_one_address_get_429_while_another_address_is_served(
        clients: tuple[TestClient, TestClient], caplog: pytest.LogCaptureFixture) -> None:
    guesser, other = clients
    caplog.set_level(logging.INFO)
    for route in ("/api/v1/channels", "/api/v1/channels/dp/reset", "/api/v1/alarms"):   # reads and a write
        method = "POST" if route.endswith("reset") else "GET"
        assert guesser.request(method, route, headers=WRONG, json={}).status_code == 401
    refused = guesser.get("/api/v1/channels", headers=WRONG)
    assert refused.status_code == 429 and refused.headers["Retry-After"] == "2"
    assert refused.json() == {"detail": "too many invalid tokens from this address: retry later"}
    # Even the right token waits (it is not checked while blocked); a write too, before its body is read.
    assert guesser.get("/api/v1/channels", headers=bearer("viewer")).status_code == 429
    assert guesser.post("/api/v1/channels/dp/reset", headers=bearer("engineer"), json={}).status_code == 429
    assert guesser.get("/api/v1/health").status_code == 200            # what needs no token is still served
    assert other.get("/api/v1/channels").status_code == 200
    assert other.post("/api/v1/channels/dp/reset", json={"user": "eve"}).status_code == 200
    assert other.get("/api/v1/channels", headers=WRONG).status_code == 401   # its own first failure only
    metrics = {line.split()[0]: float(line.split()[1]) for line in other.get("/metrics").text.splitlines()
               if line.startswith("rwls_auth_")}
    assert metrics["rwls_auth_failures_total"] == 4.0 and metrics["rwls_auth_throttled_total"] == 3.0
    assert metrics["rwls_auth_blocks_total"] == 1.0 and metrics["rwls_auth_blocked_addresses"] == 1.0
    blocked = [r.getMessage() for r in caplog.records if "throttled" in r.getMessage()]
    assert blocked and GUESSER[0] in blocked[0]
    every_token = [*TOKENS.values(), WRONG["Authorization"].split()[1]]
    assert not any(token in record.getMessage() for record in caplog.records for token in every_token)


def test_the_wait_grows_when_the_guessing_goes_on(runtime: Runtime, monkeypatch: pytest.MonkeyPatch) -> None:
    clock = Clock()
    app = create_app(runtime)
    monkeypatch.setattr(app.state.access.throttle, "_clock", clock)
    waits = []
    with api_client(app, client=GUESSER) as guesser:
        for _ in range(4):
            while (response := guesser.get("/api/v1/channels", headers=WRONG)).status_code == 401:
                pass
            waits.append(int(response.headers["Retry-After"]))
            clock.now += waits[-1]
    assert waits == [2, 4, 8, 8]


# ------------------------------------------------------------ tokens that end
def _auth_with_ends(now: datetime) -> tuple[dict[str, Any], dict[str, str]]:
    tokens = {name: new_token() for name in ("old", "soon", "later", "never")}
    ends = {"old": now - timedelta(days=1), "soon": now + timedelta(days=3), "later": now + timedelta(days=100)}
    entries = [{"name": name, "role": "engineer", "sha256": token_digest(token),
                **({"expires": ends[name]} if name in ends else {})} for name, token in tokens.items()]
    return {"reads": "token", "tokens": entries, "expiry_warning_days": 14.0}, tokens


def test_an_expired_token_is_refused_saying_it_expired_and_ready_names_those_ending_soon(tmp_path: Path) -> None:
    now = datetime.now(UTC).replace(microsecond=0)
    auth, tokens = _auth_with_ends(now)
    runtime = offline_runtime(CHANNELS, tmp_path / "store", auth=auth)
    with api_client(create_app(runtime)) as client:
        old = {"Authorization": f"Bearer {tokens['old']}"}
        for response in (client.get("/api/v1/channels", headers=old),
                         client.post("/api/v1/channels/dp/reset", headers=old, json={})):
            assert response.status_code == 401
            ended = (now - timedelta(days=1)).isoformat().replace("+00:00", "Z")
            assert response.json()["detail"] == f"token expired at {ended}: ask for a new one (`rwls token`)"
            assert response.headers["WWW-Authenticate"] == 'Bearer error="invalid_token"'
        for name in ("soon", "later", "never"):
            assert client.get("/api/v1/channels", headers={"Authorization": f"Bearer {tokens[name]}"}
                              ).status_code == 200
        ready = client.get("/api/v1/ready").json()
        assert [(t["name"], t["expired"]) for t in ready["tokens_expiring"]] == [("old", True), ("soon", False)]
        metrics = client.get("/metrics", headers={"Authorization": f"Bearer {tokens['never']}"}).text
        assert "rwls_auth_expired_tokens_total 2.0" in metrics and "rwls_auth_tokens_expiring 2.0" in metrics
        assert "rwls_auth_failures_total 0.0" in metrics                 # an expired token is no guess


def test_an_end_without_its_utc_offset_is_a_configuration_error() -> None:
    entry = {"name": "x", "role": "viewer", "sha256": "0" * 64, "expires": datetime(2027, 3, 5, 11, 30)}
    with pytest.raises(ConfigError, match="needs its UTC offset"):
        parse_config({"channels": CHANNELS, "auth": {"tokens": [entry]}})


def test_token_end_takes_spans_and_dates_and_refuses_the_past() -> None:
    now = datetime(2026, 12, 5, 11, 30, 15, 500_000, tzinfo=UTC)
    assert token_end("90d", now) == datetime(2027, 3, 5, 11, 30, 15, tzinfo=UTC)
    assert token_end("12h", now) == datetime(2026, 12, 5, 23, 30, 15, tzinfo=UTC)
    assert token_end("2027-01-01", now) == datetime(2027, 1, 1, tzinfo=UTC)
    assert token_end("2027-01-01T02:00:00+02:00", now) == datetime(2027, 1, 1, tzinfo=UTC)
    for bad in ("2020-01-01", "0d", "90", "soon"):
        with pytest.raises(ValueError, match="--expires"):
            token_end(bad, now)


def test_rwls_token_expires_writes_the_end_into_an_entry_the_settings_accept(
        capsys: pytest.CaptureFixture[str]) -> None:
    before = datetime.now(UTC)
    assert main(["token", "--name", "scada", "--role", "viewer", "--expires", "90d"]) == 0
    out, err = capsys.readouterr()
    entry = tomllib.loads(err.split("\n", 1)[1])["auth"]["tokens"][0]
    assert entry["sha256"] == token_digest(out.strip())
    assert timedelta(days=90) - timedelta(seconds=1) <= entry["expires"] - before <= timedelta(days=90, seconds=5)
    config = parse_config({"channels": CHANNELS, "auth": {"tokens": [entry]}})
    assert config.auth.tokens[0].expires == entry["expires"]
    assert main(["token", "--name", "scada", "--role", "viewer", "--expires", "yesterday"]) == 2
