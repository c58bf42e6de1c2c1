"""The dashboard in a real browser against a real ``rwls serve`` fed through Mosquitto.

One service for the module (a free fixed port, so that a restart keeps the page's origin), one channel of
an invented flow meter, tokens for every role. The tests run in file order: the alarm the third one raises
is the one the fourth acknowledges.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from playwright.sync_api import expect

from tests.auth_tokens import TOKENS, auth_section
from tests.integration.mqtt_support import free_port, publish_and_wait, unique_client_id, unique_topic_prefix
from tests.integration.service_process import ServiceProcess

pytestmark = [pytest.mark.browser, pytest.mark.integration]

CHANNEL = "line3.flow"
ALARM = f"{CHANNEL}:offset"
NORMAL_SAMPLES = 80
T0 = 1_767_225_600.0


class Plant:
    """Publishes the channel's samples in order (one seq and time per sample, never repeated)."""

    def __init__(self, broker: Any, topic: str) -> None:
        self.broker = broker
        self.topic = topic
        self.k = 0
        self.rng = np.random.default_rng(3)

    def publish(self, count: int, offset: float = 0.0) -> None:
        messages = []
        for _ in range(count):
            u = float(self.rng.uniform(0.2, 1.0))
            y = 2.0 + 40.0 * u + offset + float(self.rng.normal(0.0, 0.1))
            body = {"t": T0 + 10.0 * self.k, "y": y, "u": {"pump_speed": u}, "seq": self.k}
            messages.append((self.topic, json.dumps(body).encode()))
            self.k += 1
        for start in range(0, len(messages), 5):           # a few at a time, as a plant sends them
            publish_and_wait(self.broker, messages[start:start + 5], qos=1, timeout=30.0)
            time.sleep(0.03)


@pytest.fixture(scope="module")
def service(mqtt_broker: Any, tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[ServiceProcess, Plant]]:
    unique_prefix = unique_topic_prefix()
    topic = f"{unique_prefix}/{CHANNEL}"
    settings = {
        "channels": {CHANNEL: {"topic": topic, "terms": ["1", "pump_speed"], "forgetting_factor": 0.99,
                               "detectors": {"commissioning_samples": 40, "calibration_samples": 0}}},
        "broker": {"url": f"mqtt://127.0.0.1:{mqtt_broker.port}", "client_id": unique_client_id("rwls-ui"),
                   "dead_letter_topic": f"{unique_prefix}/dead", "reconnect_min_delay": 0.5,
                   "reconnect_max_delay": 1.0},
        "store": {"path": str(tmp_path_factory.mktemp("ui-data")), "history_step": 1.0},
        "alarms": {"topic": f"{unique_prefix}/alarms"},
        "auth": auth_section(),
    }
    process = ServiceProcess(settings, tmp_path_factory.mktemp("ui-service"), port=free_port()).start()
    plant = Plant(mqtt_broker, topic)
    try:
        process.wait_subscribed()
        plant.publish(NORMAL_SAMPLES)
        _wait(lambda: _api(process, f"/api/v1/channels/{CHANNEL}")["samples"] >= NORMAL_SAMPLES, 20.0,
              "the normal samples were not applied")
        yield process, plant
    finally:
        process.kill()


def _api(service: ServiceProcess, path: str) -> Any:
    return service.get(path)


def _wait(condition: Callable[[], bool], timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            if condition():
                return
        except OSError:
            pass
        time.sleep(0.1)
    raise AssertionError(what)


def _alarm_state(service: ServiceProcess) -> str:
    alarms = _api(service, f"/api/v1/alarms?channel={CHANNEL}&include_normal=true")["alarms"]
    return next(a["state"] for a in alarms if a["id"] == ALARM)


def test_every_page_loads_without_console_errors_and_shows_the_advisory(
        page: Any, service: tuple[ServiceProcess, Plant]) -> None:
    process, _ = service
    for where, ready in (("/", f'#channels tr[data-channel="{CHANNEL}"]'),
                         (f"/#/channel/{CHANNEL}", "#chart-noise-sigma svg"),
                         ("/#/alarms", "#alarm-count")):
        page.goto(process.url + where)
        page.wait_for_selector(ready, timeout=15_000)
        notice = page.locator(".advisory")
        assert notice.is_visible()
        assert "not a safety instrumented function" in notice.inner_text()
    page.wait_for_selector('#live[data-state="live"]', timeout=15_000)
    assert list(page.problems) == []


def test_the_channel_page_shows_the_values_the_api_gives(page: Any, service: tuple[ServiceProcess, Plant]) -> None:
    process, _ = service
    detail = _api(process, f"/api/v1/channels/{CHANNEL}")
    rows = _api(process, f"/api/v1/channels/{CHANNEL}/history?limit=5000")["rows"]
    page.goto(f"{process.url}/#/channel/{CHANNEL}")
    page.wait_for_selector("#chart-parameter-1 svg polyline", timeout=15_000)
    for term in detail["terms"]:
        shown = float(page.locator(f'#parameters tr[data-term="{term}"] .estimate').inner_text())
        assert shown == pytest.approx(detail["parameters"][term], rel=1e-7)     # 8 significant digits shown
    # The trend of each parameter has one vertex per history row with an estimate, in the chosen range.
    for j, _term in enumerate(detail["terms"]):
        lines = page.locator(f'#chart-parameter-{j} polyline[data-series="estimate"]')
        drawn = sum(int(lines.nth(i).get_attribute("data-count")) for i in range(lines.count()))
        assert drawn == sum(1 for r in rows if r["parameters"] and r["parameters"][j] is not None)
    assert page.locator("#history-count").inner_text().startswith(f"{len(rows)} history rows")
    points = page.locator('#chart-residuals g[data-series="residual"] circle').count()
    assert points == sum(1 for r in rows if r.get("residual") is not None) > 0
    assert list(page.problems) == []


def test_an_alarm_raised_by_published_samples_appears_live(page: Any, service: tuple[ServiceProcess, Plant]) -> None:
    process, plant = service
    page.goto(f"{process.url}/#/alarms")
    page.wait_for_selector('#live[data-state="live"]', timeout=15_000)
    page.evaluate("window.__same_page = true")
    before = int(page.evaluate("document.body.dataset.events || '0'"))
    plant.publish(30, offset=3.0)                          # a 30-sigma step on the flow meter
    row = page.locator(f'tr[data-alarm="{ALARM}"]')
    row.wait_for(timeout=20_000)
    assert "Unacknowledged" in row.inner_text()
    assert page.evaluate("window.__same_page === true")    # no reload: the page itself took it in
    assert int(page.evaluate("document.body.dataset.events")) > before
    assert list(page.problems) == []


def test_acknowledge_is_refused_without_a_token_and_works_with_an_operator_token(
        page: Any, service: tuple[ServiceProcess, Plant]) -> None:
    process, _ = service
    assert _alarm_state(process) == "Unacknowledged"
    page.goto(f"{process.url}/#/alarms")
    row = page.locator(f'tr[data-alarm="{ALARM}"]')
    row.wait_for(timeout=15_000)
    row.locator("button.ack").click()
    page.wait_for_selector("#action-result", timeout=10_000)
    assert "needs an API token" in page.locator("#action-result").inner_text()
    assert _alarm_state(process) == "Unacknowledged"

    page.fill("#token", TOKENS["viewer"])                  # a token, but not the role
    page.dispatch_event("#token", "change")
    page.locator(f'tr[data-alarm="{ALARM}"] button.ack').click()
    expect(page.locator("#action-result")).to_contain_text("operator", timeout=10_000)
    assert _alarm_state(process) == "Unacknowledged"

    page.fill("#token", TOKENS["operator"])
    page.dispatch_event("#token", "change")
    page.locator(f'tr[data-alarm="{ALARM}"] input.comment').fill("checked the meter on site")
    page.locator(f'tr[data-alarm="{ALARM}"] button.ack').click()
    expect(page.locator("#action-result")).to_contain_text("acknowledged", timeout=10_000)
    assert _alarm_state(process) == "Acknowledged"
    expect(page.locator(f'tr[data-alarm="{ALARM}"] .badge')).to_have_text("Acknowledged", timeout=5_000)
    journal = _api(process, f"/api/v1/alarms/journal?channel={CHANNEL}")["entries"]
    ack = [e for e in journal if e["action"] == "acknowledge"][-1]
    assert ack["user"] == "test-operator" and ack["comment"] == "checked the meter on site"
    # The refusals were the service's, shown as such, not the page failing.
    assert all("401" in p or "403" in p for p in page.problems), list(page.problems)


def test_the_live_feed_reconnects_by_itself_after_a_service_restart(
        page: Any, service: tuple[ServiceProcess, Plant], tmp_path: Path) -> None:
    process, _ = service
    page.goto(f"{process.url}/#/alarms")
    page.wait_for_selector('#live[data-state="live"]', timeout=15_000)
    assert process.stop() == 143
    page.wait_for_selector('#live[data-state="reconnecting"]', timeout=15_000)
    process.start()                                        # same port, same data directory
    page.wait_for_selector('#live[data-state="live"]', timeout=30_000)
    assert _alarm_state(process) == "Acknowledged"         # and the state came back with it
    page.wait_for_selector(f'tr[data-alarm="{ALARM}"]', timeout=15_000)
