"""MQTT over TLS with a user name, a password and a client certificate, against a Mosquitto configured here.

The certificates are made in the test (trustme: a throwaway CA, a server certificate for 127.0.0.1, a client
certificate); the password file by ``mosquitto_passwd``. The broker listens on a free loopback port, refuses
anonymous clients and requires a client certificate signed by the CA.
"""

from __future__ import annotations

import json
import shutil
import ssl
import subprocess
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
import trustme
from paho.mqtt.enums import CallbackAPIVersion

from service.config.settings import RwlsConfig, parse_config
from service.runtime import Runtime
from tests.support.addresses import LOOPBACK
from tests.support.configs import QUICK_RECONNECT
from tests.support.waits import eventually

pytestmark = pytest.mark.integration

USER = "rwls-ingest"
PASSWORD = "lantern-quay-4471"        # invented for this test's own broker


@dataclass(frozen=True)
class TlsFiles:
    ca: Path
    client_cert: Path
    client_key: Path


@pytest.fixture
def tls_broker(tmp_path: Path, private_mosquitto: Callable[..., Any]) -> Iterator[tuple[Any, TlsFiles]]:
    passwd = shutil.which("mosquitto_passwd")
    if passwd is None:
        pytest.skip("no mosquitto_passwd to make the password file")
    ca = trustme.CA()
    server = ca.issue_cert(LOOPBACK, "localhost")
    client = ca.issue_cert("rwls-ingest.client")
    files = TlsFiles(tmp_path / "ca.pem", tmp_path / "client.pem", tmp_path / "client.key")
    ca.cert_pem.write_to_path(str(files.ca))
    client.cert_chain_pems[0].write_to_path(str(files.client_cert))
    client.private_key_pem.write_to_path(str(files.client_key))
    server.cert_chain_pems[0].write_to_path(str(tmp_path / "server.pem"))
    server.private_key_pem.write_to_path(str(tmp_path / "server.key"))
    password_file = tmp_path / "passwd"
    subprocess.run([passwd, "-b", "-c", str(password_file), USER, PASSWORD], check=True, timeout=10,
                   capture_output=True)
    broker = private_mosquitto(persistence=False, tls=True, allow_anonymous=False, extra_config=[
        f"cafile {files.ca}", f"certfile {tmp_path / 'server.pem'}", f"keyfile {tmp_path / 'server.key'}",
        "require_certificate true", "tls_version tlsv1.2", f"password_file {password_file}"])
    yield broker, files


def _config(broker: Any, files: TlsFiles, store: Path, prefix: str, client: str, **broker_table: Any) -> RwlsConfig:
    table = {"url": broker.url, "client_id": client, "username": USER, "password": PASSWORD,
             "ca_file": str(files.ca), "cert_file": str(files.client_cert), "key_file": str(files.client_key),
             "dead_letter_topic": f"{prefix}/dead", **broker_table}
    return parse_config({"channels": {"dp": {"terms": ["1", "u"], "topic": f"{prefix}/dp"}},
                         "broker": {k: v for k, v in table.items() if v is not None},
                         "store": {"path": str(store)}})


def _publish_tls(broker: Any, files: TlsFiles, topic: str, payloads: list[bytes], client: str) -> None:
    """Publish at QoS 1 over the same TLS listener and wait for every PUBACK (bounded)."""
    publisher = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client)
    publisher.username_pw_set(USER, PASSWORD)
    publisher.tls_set(ca_certs=str(files.ca), certfile=str(files.client_cert), keyfile=str(files.client_key),
                      tls_version=ssl.PROTOCOL_TLS_CLIENT)
    connected = threading.Event()
    publisher.on_connect = lambda c, u, f, reason, p: connected.set() if not reason.is_failure else None
    publisher.connect(broker.host, broker.port)
    publisher.loop_start()
    try:
        assert connected.wait(10.0), "publisher could not connect over TLS"
        infos = [publisher.publish(topic, payload, qos=1) for payload in payloads]
        for info in infos:
            info.wait_for_publish(timeout=10.0)
            assert info.is_published()
    finally:
        publisher.disconnect()
        publisher.loop_stop()



@pytest.mark.parametrize("ingest", ["process", "thread"])
def test_samples_arrive_over_tls_with_password_and_client_certificate(
        tls_broker: tuple[Any, TlsFiles], tmp_path: Path, unique_prefix: str, client_id: Callable[[str], str],
        ingest: str) -> None:
    broker, files = tls_broker
    runtime = Runtime(_config(broker, files, tmp_path / "store", unique_prefix, client_id("rwls"), ingest=ingest))
    runtime.start()
    try:
        assert runtime.ingest is not None and runtime.ingest.wait_subscribed(15.0), broker.log_tail()
        payloads = [json.dumps({"t": 1000.0 + k, "y": 1.0 + 0.5 * (k % 7), "u": {"u": float(k % 7)},
                                "seq": k}).encode() for k in range(50)]
        _publish_tls(broker, files, f"{unique_prefix}/dp", payloads, client_id("pub"))
        engine = runtime.engine
        assert eventually(lambda: engine.stats.samples_applied + engine.stats.samples_warmup == 50, 20.0)
        view = runtime.engine.bank.view()["dp"]
        assert [round(float(v), 9) for v in view.parameters] == [1.0, 0.5]     # y = 1 + 0.5 u exactly
    finally:
        runtime.stop()


@pytest.mark.parametrize(("what", "change"), [
    ("wrong password", {"password": "not-the-password"}),
    ("no password", {"username": None, "password": None}),
    ("no client certificate", {"cert_file": None, "key_file": None}),
])
def test_the_broker_refuses_a_client_without_every_credential(
        tls_broker: tuple[Any, TlsFiles], tmp_path: Path, unique_prefix: str, client_id: Callable[[str], str],
        what: str, change: dict[str, Any]) -> None:
    broker, files = tls_broker
    config = _config(broker, files, tmp_path / "store", unique_prefix, client_id("rwls"), ingest="thread",
                     protocol="3.1.1", **QUICK_RECONNECT, **change)
    runtime = Runtime(config)
    runtime.start()
    try:
        assert runtime.ingest is not None
        assert not runtime.ingest.wait_connected(3.0), what
        ready = runtime.readiness()
        assert ready["ready"] is False and ready["broker"]["connected"] is False  # type: ignore[index]
        assert runtime.engine.alive() and runtime.ingest.alive()   # still trying, nothing crashed
    finally:
        runtime.stop()
