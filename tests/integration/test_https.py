"""HTTPS in the service, with throwaway certificates (trustme): served over TLS 1.2 or newer with HSTS, plain
HTTP on the TLS port answered by no HTTP, client certificates enforced when a CA is configured; and the
secure-by-default rule: write tokens beyond loopback without TLS refuse to start unless plain HTTP is accepted,
which then warns in /api/v1/ready."""

from __future__ import annotations

import contextlib
import socket
import ssl
import time
from pathlib import Path
from typing import Any

import httpx
import pytest
import trustme

from service.api.server import PlainHttpRefused, plain_http_warnings
from service.cli import main
from service.config.settings import parse_config
from tests.support.auth_tokens import auth_section, bearer
from tests.support.configs import mqtt_settings
from tests.support.http_servers import running_server
from tests.support.service_process import ServiceProcess, toml_text

pytestmark = pytest.mark.integration

CHANNELS = {"dp": {"terms": ["1", "u"]}}


def _tls_files(tmp_path: Path, ca: trustme.CA) -> dict[str, str]:
    server = ca.issue_cert("127.0.0.1", "localhost")
    server.cert_chain_pems[0].write_to_path(tmp_path / "server.pem")
    for pem in server.cert_chain_pems[1:]:
        pem.write_to_path(tmp_path / "server.pem", append=True)
    server.private_key_pem.write_to_path(tmp_path / "server.key")
    return {"tls_cert_file": str(tmp_path / "server.pem"), "tls_key_file": str(tmp_path / "server.key")}


def _client_context(ca: trustme.CA, client: trustme.LeafCert | None = None, **versions: Any) -> ssl.SSLContext:
    context = ssl.create_default_context(ssl.Purpose.SERVER_AUTH)
    ca.configure_trust(context)
    if client is not None:
        client.configure_cert(context)
    for name, version in versions.items():
        setattr(context, name, version)
    return context


def _handshake(port: int, context: ssl.SSLContext) -> tuple[str | None, bytes]:
    """The TLS version negotiated and the answer to one GET /api/v1/health (as raw bytes)."""
    with socket.create_connection(("127.0.0.1", port), timeout=5.0) as raw, \
            context.wrap_socket(raw, server_hostname="127.0.0.1") as tls:
        tls.sendall(b"GET /api/v1/health HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")
        answer = b""
        while chunk := tls.recv(65536):
            answer += chunk
        return tls.version(), answer


def test_https_is_served_over_tls_1_2_or_newer_with_hsts_and_plain_http_gets_no_answer(tmp_path: Path) -> None:
    ca = trustme.CA()
    http = {**_tls_files(tmp_path, ca), "hsts_seconds": 86400}
    with running_server(CHANNELS, tmp_path / "store", http=http, auth=auth_section()) as served:
        assert served.url.startswith("https://")
        with httpx.Client(verify=_client_context(ca), base_url=served.url, timeout=5.0) as client:
            health = client.get("/api/v1/health")
            assert health.status_code == 200
            assert health.headers["strict-transport-security"] == "max-age=86400"
            assert client.post("/api/v1/channels/dp/reset", json={"user": "eve"},
                               headers=bearer("engineer")).status_code == 200
        version, answer = _handshake(served.port, _client_context(ca))
        assert version in ("TLSv1.2", "TLSv1.3") and answer.startswith(b"HTTP/1.1 200")
        version, _ = _handshake(served.port, _client_context(ca, maximum_version=ssl.TLSVersion.TLSv1_2))
        assert version == "TLSv1.2"
        # Older versions are refused by the server's own context (a client offering them is itself refused by
        # this machine's OpenSSL before it could ask, so the setting is read rather than tried).
        context = served.server.config.ssl
        assert context is not None and context.minimum_version == ssl.TLSVersion.TLSv1_2
        with pytest.raises(httpx.HTTPError):       # plain HTTP on the TLS port: no HTTP answer
            httpx.get(f"http://127.0.0.1:{served.port}/api/v1/health", timeout=5.0)
        with pytest.raises(httpx.ConnectError):    # a client that does not trust the CA refuses the server
            httpx.get(served.url + "/api/v1/health", timeout=5.0)


def test_with_a_client_ca_every_client_needs_a_certificate_it_signed(tmp_path: Path) -> None:
    ca, stranger = trustme.CA(), trustme.CA()
    ca.cert_pem.write_to_path(tmp_path / "clients-ca.pem")
    http = {**_tls_files(tmp_path, ca), "tls_client_ca_file": str(tmp_path / "clients-ca.pem")}
    with running_server(CHANNELS, tmp_path / "store", http=http, auth=auth_section()) as served:
        _, answer = _handshake(served.port, _client_context(ca, ca.issue_cert("scada@plant.example")))
        assert answer.startswith(b"HTTP/1.1 200")
        for refused in (_client_context(ca), _client_context(ca, stranger.issue_cert("scada@plant.example"))):
            # TLS 1.3 reports the refused certificate at the first read, TLS 1.2 during the handshake.
            with pytest.raises((ssl.SSLError, ConnectionError)):
                _, answer = _handshake(served.port, refused)
                if not answer:
                    raise ConnectionResetError("closed without an answer")


def _config(**http: Any) -> Any:
    return parse_config({"channels": CHANNELS, "auth": auth_section(), "http": http})


def test_write_tokens_beyond_loopback_without_tls_refuse_to_start_saying_how_to_fix_it(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "rwls.toml"
    path.write_text(toml_text({"channels": {"dp": {"terms": ["1", "u"], "topic": "t/dp"}}, "auth": auth_section(),
                               "store": {"path": str(tmp_path / "store")}}))
    assert main(["serve", "-c", str(path), "--host", "0.0.0.0", "--port", "0"]) == 2
    err = capsys.readouterr().err
    assert "refusing to start" in err and "http.tls_cert_file" in err and "http.allow_plain_http" in err
    assert not (tmp_path / "store").exists()          # refused before anything started
    exposed = tmp_path / "exposed.toml"
    exposed.write_text(path.read_text() + '\n[http]\nhost = "0.0.0.0"\n')
    assert main(["check-config", str(exposed)]) == 0 and main(["check-config", str(exposed), "--serve"]) == 2
    assert "http: http.host '0.0.0.0' reaches beyond this machine" in capsys.readouterr().err
    accepted = tmp_path / "accepted.toml"
    accepted.write_text(exposed.read_text() + "allow_plain_http = true\n")
    assert main(["check-config", str(accepted), "--serve"]) == 0
    assert "warning: plain HTTP beyond loopback" in capsys.readouterr().err
    with pytest.raises(PlainHttpRefused, match="test-engineer"):
        plain_http_warnings(_config(), "192.0.2.10")
    assert plain_http_warnings(_config(), "127.0.0.1") == [] and plain_http_warnings(_config(), "::1") == []
    viewers_only = parse_config({"channels": CHANNELS, "auth": {"tokens": [auth_section()["tokens"][0]]}})
    assert "read tokens" in plain_http_warnings(viewers_only, "0.0.0.0")[0]     # warned, not refused


def test_plain_http_accepted_knowingly_warns_in_ready(tmp_path: Path) -> None:
    warnings = plain_http_warnings(_config(allow_plain_http=True), "0.0.0.0")
    assert len(warnings) == 1 and "clear text" in warnings[0]
    with running_server(CHANNELS, tmp_path / "store", http={"allow_plain_http": True}, auth=auth_section()) as served:
        served.app.state.http_warnings = warnings    # what `rwls serve` sets from the same function
        ready = httpx.get(served.url + "/api/v1/ready", timeout=5.0)
        assert ready.json()["warnings"] == warnings
        assert "strict-transport-security" not in ready.headers        # HSTS only over TLS


def test_tls_settings_go_together() -> None:
    with pytest.raises(Exception, match="tls_cert_file and tls_key_file go together"):
        _config(tls_cert_file="/etc/rwls/server.pem")
    with pytest.raises(Exception, match="tls_client_ca_file needs"):
        _config(tls_client_ca_file="/etc/rwls/ca.pem")


def test_connections_that_never_finish_the_tls_handshake_are_dropped_after_the_header_timeout(
        tmp_path: Path) -> None:
    ca = trustme.CA()
    http = {**_tls_files(tmp_path, ca), "header_timeout": 1.0}
    with running_server(CHANNELS, tmp_path / "store", http=http) as served:
        stalled = [socket.create_connection(("127.0.0.1", served.port), timeout=10.0) for _ in range(200)]
        started = time.monotonic()
        try:
            _, answer = _handshake(served.port, _client_context(ca))          # served meanwhile
            assert answer.startswith(b"HTTP/1.1 200")
            for sock in stalled:
                with contextlib.suppress(ConnectionResetError):
                    assert sock.recv(1) == b""
            waited = time.monotonic() - started
        finally:
            for sock in stalled:
                sock.close()
    assert waited < 8.0, f"held {waited:.1f} s (asyncio's own handshake timeout is 60 s)"


def test_rwls_serve_serves_https_from_its_settings(tmp_path: Path, mqtt_broker: Any, unique_prefix: str,
                                                  client_id: Any) -> None:
    ca = trustme.CA()
    settings = mqtt_settings(CHANNELS, prefix=unique_prefix, port=mqtt_broker.port, client_id=client_id("rwls"),
                             store=tmp_path / "data", auth=auth_section(), http=_tls_files(tmp_path, ca))
    service = ServiceProcess(settings, tmp_path / "service").start()
    try:
        assert service.url.startswith("https://127.0.0.1:")
        port = int(service.url.rsplit(":", 1)[1])
        version, answer = _handshake(port, _client_context(ca))
        assert version in ("TLSv1.2", "TLSv1.3") and answer.startswith(b"HTTP/1.1 200")
        assert b"strict-transport-security: max-age=31536000" in answer.lower()
        with pytest.raises(httpx.HTTPError):
            httpx.get(f"http://127.0.0.1:{port}/api/v1/health", timeout=5.0)
    finally:
        service.stop()
