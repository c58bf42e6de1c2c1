"""`rwls demo`: everything in one process on embedded defaults.

An embedded MQTT broker on a free loopback port, the demo plant publishing to
it, the service (engine, ingest, API) with its data directory, and the URL
printed. The plant publishes its tags (``rwls simulate``'s default shape) and the service assembles
the channels from them, as ``examples/larkspur_sub7.toml`` configures (:data:`DEMO_CONFIG` is its copy).
"""

from __future__ import annotations

import logging
import threading
import tomllib
from datetime import UTC, datetime
from pathlib import Path

from service.advisory import ADVISORY
from service.api.app import create_app
from service.api.auth import new_token, token_digest
from service.api.listen_socket import bind_listener
from service.api.server import http_server
from service.config.http_settings import is_loopback
from service.config.settings import RwlsConfig, parse_config
from service.demo.embedded_broker import EmbeddedBroker
from service.demo.simulate import simulate
from service.runtime import Runtime, exit_on_signal

__all__ = ["DEMO_CONFIG", "demo_config", "recovered_positions", "run_demo"]

log = logging.getLogger(__name__)

DEMO_CONFIG = Path(__file__).with_name("larkspur_sub7.toml")
"""The demo plant's tags and channels: a copy of ``examples/larkspur_sub7.toml``, with its tag list beside it
(a test keeps both files equal to the examples)."""


def demo_config(broker_url: str, data_dir: str, engineer_token: str | None = None) -> RwlsConfig:
    """The demo channels against a broker URL, with the store in ``data_dir`` (and one engineer token)."""
    data = tomllib.loads(DEMO_CONFIG.read_text(encoding="utf-8"))
    data["tags"]["files"] = [str(DEMO_CONFIG.with_name(name)) for name in data["tags"]["files"]]
    # The embedded broker speaks MQTT 3.1.1: say so, rather than probe with v5 and have it log the refusal.
    data["broker"] = {"url": broker_url, "client_id": "rwls-demo", "protocol": "3.1.1"}
    data["store"] = {"path": data_dir}
    if engineer_token is not None:
        data["auth"] = {"tokens": [{"name": "demo-engineer", "role": "engineer",
                                    "sha256": token_digest(engineer_token)}]}
    return parse_config(data)


def recovered_positions(runtime: Runtime) -> dict[str, float]:
    """Each channel's newest applied sample time, as recovered from the data directory (empty on a first run)."""
    return {cid: entry.last_t for cid, entry in runtime.engine.snapshot.channels.items()
            if entry.last_t is not None}


def run_demo(*, host: str = "127.0.0.1", port: int = 8080, rate: float = 200.0, data_dir: str = "rwls-demo-data",
             exit_after: float | None = None) -> int:
    """Run the demo until Ctrl-C (or ``exit_after`` seconds); returns the exit status.

    ``data_dir`` (relative to the working directory) keeps the state between runs: a second run recovers
    it and the simulated plant carries on after the newest sample the service holds.

    Raises
    ------
    PortUnavailable
        ``port`` is taken (before anything else starts).
    """
    sock = bind_listener(host, port)           # first: a taken port costs nothing to find out
    actual_port = sock.getsockname()[1]
    broker = EmbeddedBroker()
    broker.start()
    token = new_token()                       # a fresh one each run: writes always need a token
    config = demo_config(broker.url, data_dir, token)
    runtime = Runtime(config)
    runtime.start()
    resume = recovered_positions(runtime)
    # The service's own server: its connection limits and header timeout (plain HTTP: the demo has no certificate).
    server = http_server(create_app(runtime, manage_runtime=False), config, log_level="warning")
    stop = threading.Event()

    def publish() -> None:
        if runtime.ingest is not None and not runtime.ingest.wait_subscribed(30.0):
            log.error("the service did not subscribe to the embedded broker within 30 s; the plant publishes anyway")
        try:
            simulate(broker.host, broker.port, prefix="larkspur", payload="tags", rate=rate, stop=stop,
                     client_id="rwls-demo-plant", resume_after=resume)
        except Exception:
            log.exception("demo plant stopped")

    def stopper() -> None:
        if exit_after is not None and not stop.wait(exit_after):
            server.should_exit = True

    plant = threading.Thread(target=publish, name="rwls-demo-plant", daemon=True)
    timer = threading.Thread(target=stopper, name="rwls-demo-timer", daemon=True)
    print(f"rwls demo: service at http://{host}:{actual_port}/ (API docs /docs, snapshot /api/v1/snapshot)",
          flush=True)
    print(f"rwls demo: embedded MQTT broker at {broker.url}; plant publishing its tags, {rate:g} messages/s",
          flush=True)
    if resume:
        newest = datetime.fromtimestamp(max(resume.values()), UTC).strftime("%Y-%m-%d %H:%M UTC")
        print(f"rwls demo: state recovered from {data_dir}/; the plant carries on after {newest} (plant time); "
              f"delete that directory to start the month afresh", flush=True)
    print(f"rwls demo: engineer token for this run (Authorization: Bearer ...): {token}", flush=True)
    if not is_loopback(host):
        print(f"rwls demo: warning: {host} reaches beyond this machine and the demo serves plain HTTP: this token "
              f"and every write cross the network in clear text (the service itself refuses this without "
              f"http.allow_plain_http)", flush=True)
    print(f"rwls demo: {ADVISORY}", flush=True)
    plant.start()
    timer.start()
    exit_on_signal()
    try:
        server.run(sockets=[sock])
    finally:
        stop.set()
        plant.join(5.0)
        runtime.stop()
        broker.stop()
    return 0
