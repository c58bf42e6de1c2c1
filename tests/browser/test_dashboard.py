"""The dashboard in a real browser against a real ``rwls serve`` fed through Mosquitto.

One service for the module (a free fixed port, so that a restart keeps the page's origin) with invented
flow meters and a level transmitter, tokens for every role. Every test stands alone, in any order and
alone: the module's set-up commissions every channel once, and each test that needs an alarm raises its
own on a channel no other test touches (acknowledged, shelved or restarted there and nowhere else). Waits
are on conditions (Playwright's expect, or polling the API with a deadline), never fixed sleeps.
"""

from __future__ import annotations

import json
import time
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import numpy as np
import pytest
from playwright.sync_api import expect

from tests.support.addresses import free_port, unique_client_id, unique_topic_prefix
from tests.support.auth_tokens import TOKENS, auth_section, bearer
from tests.support.configs import QUICK_RECONNECT, alarms_table, mqtt_settings
from tests.support.mqtt_clients import publish_and_wait
from tests.support.service_process import ServiceProcess
from tests.support.waits import wait_until

pytestmark = [pytest.mark.browser, pytest.mark.integration]

CHANNEL = "line3.flow"                 # normal samples only: its page, trends and times
COMMISSIONING = "line9.level"          # never gets enough samples to end commissioning
# One channel per test that raises an alarm: what one test acknowledges or shelves, no other test sees.
ALARMING = {"live": "line4.flow", "ack": "line5.flow", "shelve": "line6.flow", "since": "line7.flow",
            "filter": "line8.flow", "restart": "line10.flow"}
NORMAL_SAMPLES = 80
COMMISSIONING_SAMPLES = 40
STARTUP = 10                           # samples at a near-constant pump speed before the plant moves
STARTED_SAMPLES = 12                   # what the commissioning channel gets, of its 1000
T0 = 1_767_225_600.0                   # 2026-01-01T00:00:00Z, the plant's first sample


class Plant:
    """Publishes one channel's samples in order (one seq and time per sample, never repeated)."""

    def __init__(self, broker: Any, topic: str, seed: int) -> None:
        self.broker = broker
        self.topic = topic
        self.k = 0
        self.rng = np.random.default_rng(seed)

    def messages(self, count: int, offset: float = 0.0) -> list[tuple[str, bytes]]:
        out = []
        for _ in range(count):
            # Start-up: the pump held near one speed for the first samples, so that the two terms are barely
            # told apart and the first estimates swing wide (the start-up transient of the parameter trends).
            u = float(self.rng.uniform(0.2, 1.0) if self.k >= STARTUP else self.rng.uniform(0.59, 0.61))
            y = 2.0 + 40.0 * u + offset + float(self.rng.normal(0.0, 0.1))
            body = {"t": T0 + 10.0 * self.k, "y": y, "u": {"pump_speed": u}, "seq": self.k}
            out.append((self.topic, json.dumps(body).encode()))
            self.k += 1
        return out

    def publish(self, count: int, offset: float = 0.0) -> None:
        messages = self.messages(count, offset)
        for start in range(0, len(messages), 5):           # a few at a time, as a plant sends them
            publish_and_wait(self.broker, messages[start:start + 5], qos=1, timeout=30.0)


def _feed(process: ServiceProcess, plants: dict[str, Plant], count: int) -> None:
    """``count`` samples to each of ``plants``, five at a time; each five applied before the next are sent (so the
    history has a row for each five, as from a plant sending every few seconds)."""
    for _ in range(0, count, 5):
        step = min(5, count - min(p.k for p in plants.values()))
        messages = [m for plant in plants.values() for m in plant.messages(step)]
        publish_and_wait(plants[next(iter(plants))].broker, messages, qos=1, timeout=30.0)
        wanted = {name: plant.k for name, plant in plants.items()}
        wait_until(lambda wanted=wanted: all(c["samples"] >= wanted[c["id"]] for c in process.get("/api/v1/channels")
                                             if c["id"] in wanted), 30.0, "the samples to be applied")


@dataclass
class Site:
    process: ServiceProcess
    plants: dict[str, Plant]

    @property
    def url(self) -> str:
        return self.process.url


def _channel(commissioning: int) -> dict[str, Any]:
    return {"terms": ["1", "pump_speed"], "forgetting_factor": 0.99,
            # No noise-shape table: the offset alarms these tests raise follow a short commissioning at once.
            "detectors": {"commissioning_samples": commissioning, "calibration_samples": 0}}


@pytest.fixture(scope="module")
def site(mqtt_broker: Any, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Site]:
    prefix = unique_topic_prefix()
    commissioned = [CHANNEL, *ALARMING.values()]
    channels = {name: _channel(COMMISSIONING_SAMPLES) for name in commissioned}
    channels[COMMISSIONING] = _channel(1000)
    settings = mqtt_settings(channels, prefix=prefix, port=mqtt_broker.port, client_id=unique_client_id("rwls-ui"),
                             broker=QUICK_RECONNECT, store=tmp_path_factory.mktemp("ui-data"),
                             store_options={"history_step": 1.0}, alarms=alarms_table(prefix), auth=auth_section())
    process = ServiceProcess(settings, tmp_path_factory.mktemp("ui-service"), port=free_port()).start()
    plants = {name: Plant(mqtt_broker, settings["channels"][name]["topic"], seed)
              for seed, name in enumerate(channels, 3)}
    try:
        process.wait_subscribed()
        _feed(process, {name: plants[name] for name in commissioned}, NORMAL_SAMPLES)
        _feed(process, {COMMISSIONING: plants[COMMISSIONING]}, STARTED_SAMPLES)
        for name in commissioned:
            assert _detail(process, name)["baseline"] is not None, f"{name} did not commission"
        yield Site(process, plants)
    finally:
        process.kill()


# ----------------------------------------------------------------- helpers
def _detail(service: ServiceProcess, channel: str) -> Any:
    return service.get(f"/api/v1/channels/{channel}")



def _alarm(service: ServiceProcess, channel: str, kind: str = "offset") -> dict[str, Any]:
    alarms = service.get(f"/api/v1/alarms?channel={channel}&include_normal=true")["alarms"]
    return next(a for a in alarms if a["id"] == f"{channel}:{kind}")


def _raise_offset(site: Site, channel: str) -> dict[str, Any]:
    """A 30-sigma step on ``channel``'s meter; returns its offset alarm once Unacknowledged."""
    site.plants[channel].publish(30, offset=3.0)
    wait_until(lambda: _alarm(site.process, channel)["state"] == "Unacknowledged", 20.0,
               f"an offset alarm on {channel}")
    return _alarm(site.process, channel)


def _post(service: ServiceProcess, path: str, body: dict[str, Any], role: str) -> Any:
    request = urllib.request.Request(service.url + path, data=json.dumps(body).encode(), method="POST",
                                     headers={"Content-Type": "application/json", **bearer(role)})
    with urllib.request.urlopen(request, timeout=10.0) as response:
        return json.loads(response.read())


def _iso(seconds: float) -> str:
    """ISO 8601 UTC to the second, as the dashboard writes times."""
    return datetime.fromtimestamp(seconds, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _extent(rows: list[dict[str, Any]], j: int) -> tuple[float, float]:
    """Smallest and largest of parameter ``j`` and its +/- 2 s.e. band over ``rows``."""
    values = []
    for r in rows:
        if r["parameters"] and r["parameters"][j] is not None:
            v, se = r["parameters"][j], (r["std_errors"] or [None] * (j + 1))[j]
            values += [v] if se is None else [v, v - 2 * se, v + 2 * se]
    return min(values), max(values)


# ------------------------------------------------------------------- tests
def test_every_page_loads_without_console_errors_and_shows_the_advisory(page: Any, site: Site) -> None:
    for where, ready in (("/", f'#channels tr[data-channel="{CHANNEL}"]'),
                         (f"/#/channel/{CHANNEL}", "#chart-noise-sigma svg"),
                         ("/#/alarms", "#alarm-count")):
        page.goto(site.url + where)
        page.wait_for_selector(ready, timeout=15_000)
        notice = page.locator(".advisory")
        assert notice.is_visible()
        assert "not a safety instrumented function" in notice.inner_text()
    page.wait_for_selector('#live[data-state="live"]', timeout=15_000)
    assert list(page.problems) == []


def test_the_channel_page_shows_the_values_the_api_gives(page: Any, site: Site) -> None:
    detail = _detail(site.process, CHANNEL)
    rows = site.process.get(f"/api/v1/channels/{CHANNEL}/history?limit=5000")["rows"]
    settled = detail["baseline"]["t"]
    page.goto(f"{site.url}/#/channel/{CHANNEL}")
    page.wait_for_selector("#chart-parameter-1 svg polyline", timeout=15_000)
    for term in detail["terms"]:
        shown = float(page.locator(f'#parameters tr[data-term="{term}"] .estimate').inner_text())
        assert shown == pytest.approx(detail["parameters"][term], rel=1e-7)     # 8 significant digits shown
    # The trend of each parameter has one vertex per history row with an estimate since commissioning ended.
    for j, _term in enumerate(detail["terms"]):
        lines = page.locator(f'#chart-parameter-{j} polyline[data-series="estimate"]')
        drawn = sum(int(lines.nth(i).get_attribute("data-count")) for i in range(lines.count()))
        assert drawn == sum(1 for r in rows if r["t"] >= settled and r["parameters"] and r["parameters"][j] is not None)
    assert page.locator("#history-count").inner_text().startswith(f"{len(rows)} history rows")
    points = page.locator('#chart-residuals g[data-series="residual"] circle').count()
    assert points == sum(1 for r in rows if r.get("residual") is not None) > 0
    assert list(page.problems) == []


def test_parameter_trends_scale_on_the_commissioned_range_and_show_the_transient_on_request(
        page: Any, site: Site) -> None:
    detail = _detail(site.process, CHANNEL)
    rows = site.process.get(f"/api/v1/channels/{CHANNEL}/history?limit=5000")["rows"]
    settled = detail["baseline"]["t"]
    after = [r for r in rows if r["t"] >= settled]
    page.goto(f"{site.url}/#/channel/{CHANNEL}")
    page.wait_for_selector("#chart-parameter-1 svg polyline", timeout=15_000)
    expect(page.locator("#transient-note")).to_contain_text(f"before commissioning ended at {_iso(settled)}")
    for j, term in enumerate(detail["terms"]):
        lo, hi = _extent(after, j)
        reference = detail["baseline"]["parameters"][term]
        lo, hi = min(lo, reference), max(hi, reference)
        full_lo, full_hi = _extent(rows, j)
        assert full_hi - full_lo > 3 * (hi - lo), "the data have no start-up transient to leave out"
        chart = page.locator(f"#chart-parameter-{j} svg")
        y_lo, y_hi = float(chart.get_attribute("data-y-lo")), float(chart.get_attribute("data-y-hi"))
        # The axis spans the commissioned rows and the baseline (with the chart's 5 % margins), no more.
        assert y_lo == pytest.approx(lo - 0.05 * (hi - lo), rel=1e-9, abs=1e-9 * (hi - lo))
        assert y_hi == pytest.approx(hi + 0.05 * (hi - lo), rel=1e-9, abs=1e-9 * (hi - lo))
    box = page.get_by_label("show start-up transient")
    expect(box).not_to_be_checked()
    box.check()
    expect(page.locator("#transient-note")).to_contain_text("transient is shown")
    for j, _term in enumerate(detail["terms"]):
        full_lo, full_hi = _extent(rows, j)
        chart = page.locator(f"#chart-parameter-{j} svg")
        assert float(chart.get_attribute("data-y-lo")) <= full_lo
        assert float(chart.get_attribute("data-y-hi")) >= full_hi
        lines = page.locator(f'#chart-parameter-{j} polyline[data-series="estimate"]')
        drawn = sum(int(lines.nth(i).get_attribute("data-count")) for i in range(lines.count()))
        assert drawn == sum(1 for r in rows if r["parameters"] and r["parameters"][j] is not None)
    assert list(page.problems) == []


def test_an_alarm_raised_by_published_samples_appears_live(page: Any, site: Site) -> None:
    channel = ALARMING["live"]
    page.goto(f"{site.url}/#/alarms")
    page.wait_for_selector('#live[data-state="live"]', timeout=15_000)
    page.evaluate("window.__same_page = true")
    before = int(page.evaluate("document.body.dataset.events || '0'"))
    site.plants[channel].publish(30, offset=3.0)           # a 30-sigma step on the flow meter
    row = page.locator(f'tr[data-alarm="{channel}:offset"]')
    expect(row).to_contain_text("Unacknowledged", timeout=20_000)
    assert page.evaluate("window.__same_page === true")    # no reload: the page itself took it in
    assert int(page.evaluate("document.body.dataset.events")) > before
    assert list(page.problems) == []


def test_acknowledge_is_refused_without_a_token_and_works_with_an_operator_token(page: Any, site: Site) -> None:
    channel = ALARMING["ack"]
    alarm = f"{channel}:offset"
    _raise_offset(site, channel)
    page.goto(f"{site.url}/#/alarms")
    row = page.locator(f'tr[data-alarm="{alarm}"]')
    row.wait_for(timeout=15_000)
    row.locator("button.ack").click()
    expect(page.locator("#action-result")).to_contain_text("needs an API token", timeout=10_000)
    assert _alarm(site.process, channel)["state"] == "Unacknowledged"

    page.fill("#token", TOKENS["viewer"])                  # a token, but not the role
    page.dispatch_event("#token", "change")
    page.locator(f'tr[data-alarm="{alarm}"] button.ack').click()
    expect(page.locator("#action-result")).to_contain_text("operator", timeout=10_000)
    assert _alarm(site.process, channel)["state"] == "Unacknowledged"

    page.fill("#token", TOKENS["operator"])
    page.dispatch_event("#token", "change")
    page.locator(f'tr[data-alarm="{alarm}"] input.comment').fill("checked the meter on site")
    page.locator(f'tr[data-alarm="{alarm}"] button.ack').click()
    expect(page.locator("#action-result")).to_contain_text("acknowledged", timeout=10_000)
    assert _alarm(site.process, channel)["state"] == "Acknowledged"
    expect(page.locator(f'tr[data-alarm="{alarm}"] .badge')).to_have_text("Acknowledged", timeout=5_000)
    journal = site.process.get(f"/api/v1/alarms/journal?channel={channel}")["entries"]
    ack = [e for e in journal if e["action"] == "acknowledge"][-1]
    assert ack["user"] == "test-operator" and ack["comment"] == "checked the meter on site"
    # The refusals were the service's, shown as such, not the page failing.
    assert all("401" in p or "403" in p for p in page.problems), list(page.problems)


def test_the_shelve_minutes_field_is_labelled_and_its_minutes_are_the_ones_sent(page: Any, site: Site) -> None:
    channel = ALARMING["shelve"]
    alarm = f"{channel}:offset"
    _raise_offset(site, channel)
    page.goto(f"{site.url}/#/alarms")
    row = page.locator(f'tr[data-alarm="{alarm}"]')
    row.wait_for(timeout=15_000)
    label = row.locator("label:has(input.minutes)")        # a real <label> around the field, words on screen
    expect(label).to_have_text(f"Shelve {alarm} for min")  # the alarm id is there for screen readers only
    field = page.get_by_label(f"Shelve {alarm} for")
    expect(field).to_have_value("60")
    page.fill("#token", TOKENS["operator"])
    page.dispatch_event("#token", "change")
    field.fill("15")
    asked = time.time()
    row.locator("button.shelve").click()
    expect(page.locator("#action-result")).to_contain_text("shelved", timeout=10_000)
    shelved = _alarm(site.process, channel)
    assert shelved["state"] == "Shelved"
    assert shelved["shelved_until"] - asked == pytest.approx(15 * 60.0, abs=30.0)     # 15 min, as typed
    assert list(page.problems) == []


def test_since_is_the_sample_time_of_the_condition_also_after_an_acknowledgement(page: Any, site: Site) -> None:
    channel = ALARMING["since"]
    raised = _raise_offset(site, channel)
    _post(site.process, f"/api/v1/alarms/{channel}:offset/ack", {"comment": "seen"}, "operator")
    acknowledged = _alarm(site.process, channel)
    assert acknowledged["state"] == "Acknowledged"
    condition_t = acknowledged["evidence"]["t"]
    assert condition_t == raised["evidence"]["t"]
    # The alarm's own "since" is now the acknowledgement's wall clock, months after the plant's samples.
    assert acknowledged["since"] - condition_t > 86400.0
    page.goto(f"{site.url}/#/alarms")
    row = page.locator(f'tr[data-alarm="{channel}:offset"]')
    expect(row.locator(".badge")).to_have_text("Acknowledged", timeout=15_000)
    expect(page.locator("#since-heading")).to_have_text("Since (sample time, UTC)")
    expect(row.locator("td.since")).to_have_text(_iso(condition_t))
    assert list(page.problems) == []


def test_a_commissioning_channel_shows_its_progress_and_is_not_counted_as_raised(page: Any, site: Site) -> None:
    alarmed = ALARMING["filter"]
    _raise_offset(site, alarmed)
    listed = {c["id"]: c for c in site.process.get("/api/v1/channels")}
    assert listed[COMMISSIONING]["commissioning"] == {"done": STARTED_SAMPLES, "needed": 1000}
    assert {a["state"] for a in listed[COMMISSIONING]["alarms"]["raised"]} == {"Suppressed by design"}
    page.goto(site.url + "/")
    row = page.locator(f'#channels tr[data-channel="{COMMISSIONING}"]')
    expect(row).to_contain_text(f"commissioning ({STARTED_SAMPLES} of 1000 samples)", timeout=15_000)
    expect(row).not_to_contain_text("Suppressed by design")
    page.get_by_label("Raised alarms only").check()
    expect(page.locator(f'#channels tr[data-channel="{alarmed}"]')).to_be_visible()
    expect(row).to_have_count(0)
    expect(page.locator(f'#channels tr[data-channel="{CHANNEL}"]')).to_have_count(0)
    page.goto(f"{site.url}/#/channel/{COMMISSIONING}")
    expect(page.locator("#channel-alarms")).to_contain_text(f"commissioning ({STARTED_SAMPLES} samples so far")
    expect(page.locator("#channel-alarms")).not_to_contain_text("Suppressed by design")
    assert list(page.problems) == []


def test_times_are_iso_8601_utc_and_the_time_range_is_typed_as_such(page: Any, site: Site) -> None:
    detail = _detail(site.process, CHANNEL)
    page.goto(site.url + "/")
    last = page.locator(f'#channels tr[data-channel="{CHANNEL}"] td.num').first
    expect(last).to_have_text(_iso(detail["t"]), timeout=15_000)

    page.goto(f"{site.url}/#/channel/{CHANNEL}")
    page.wait_for_selector("#chart-parameter-1 svg polyline", timeout=15_000)
    field_from, field_until = page.get_by_label("From (UTC)"), page.get_by_label("Until (UTC)")
    for field in (field_from, field_until):
        assert field.get_attribute("type") == "text"          # no locale-bound date picker
        assert field.get_attribute("placeholder") == "2026-06-11T00:56Z"
    field_from.fill("01/01/2026 00:05")                        # a locale's way of writing it: refused, said why
    field_until.fill("2026-01-01T00:10Z")
    page.locator("#range-apply").click()
    expect(page.locator("#range-error")).to_contain_text('From: "01/01/2026 00:05" is not a UTC time in ISO 8601')
    expect(field_from).to_have_attribute("aria-invalid", "true")
    assert field_from.evaluate("node => node.validity.patternMismatch")
    field_from.fill("2026-01-01T00:10Z")
    page.locator("#range-apply").click()
    expect(page.locator("#range-error")).to_have_text("Until must be after From.")
    field_from.fill("2026-01-01T00:05Z")
    page.locator("#range-apply").click()
    expect(page.locator("#range-error")).to_have_count(0)
    rows = site.process.get(f"/api/v1/channels/{CHANNEL}/history?since={T0 + 300}&until={T0 + 600}&limit=5000")["rows"]
    expect(page.locator("#history-count")).to_have_text(
        f"{len(rows)} history rows, 2026-01-01T00:05:00Z to 2026-01-01T00:10:00Z (sample time, UTC).")
    expect(field_from).to_have_value("2026-01-01T00:05:00Z")
    assert list(page.problems) == []


def test_the_live_feed_reconnects_by_itself_after_a_service_restart(page: Any, site: Site, tmp_path: Path) -> None:
    channel = ALARMING["restart"]
    _raise_offset(site, channel)
    _post(site.process, f"/api/v1/alarms/{channel}:offset/ack", {"comment": "before the restart"}, "operator")
    assert _alarm(site.process, channel)["state"] == "Acknowledged"
    page.goto(f"{site.url}/#/alarms")
    page.wait_for_selector('#live[data-state="live"]', timeout=15_000)
    assert site.process.stop() == 143
    page.wait_for_selector('#live[data-state="reconnecting"]', timeout=15_000)
    site.process.start()                                   # same port, same data directory
    site.process.wait_subscribed()
    page.wait_for_selector('#live[data-state="live"]', timeout=30_000)
    assert _alarm(site.process, channel)["state"] == "Acknowledged"     # and the state came back with it
    expect(page.locator(f'tr[data-alarm="{channel}:offset"] .badge')).to_have_text("Acknowledged", timeout=15_000)


def test_the_api_reference_renders_with_no_request_leaving_loopback(page: Any, site: Site) -> None:
    left: list[str] = []
    seen: list[str] = []

    def only_loopback(route: Any) -> None:
        url = route.request.url
        if urlsplit(url).hostname == "127.0.0.1":
            route.continue_()
        else:                                      # what an isolated plant network would do to it
            left.append(url)
            route.abort()

    page.route("**/*", only_loopback)
    page.on("request", lambda request: seen.append(request.url))
    page.goto(site.url + "/docs")
    # The operation as Swagger UI draws it: the method, then the path (GET /api/v1/channels).
    path = page.locator('.opblock-summary-path[data-path="/api/v1/channels"]')
    operation = page.locator(".opblock-summary", has=path)
    expect(operation).to_be_visible(timeout=15_000)
    expect(operation.locator(".opblock-summary-method")).to_have_text("GET")
    expect(operation.locator(".opblock-summary-path")).to_have_text("/api/v1/channels")
    expect(page.get_by_role("note")).to_contain_text("not a safety instrumented function")
    expect(page.get_by_role("link", name="its licence")).to_have_attribute("href", "/docs/assets/LICENSE")
    assert left == []
    assert seen and all(urlsplit(u).hostname == "127.0.0.1" for u in seen if not u.startswith("data:")), seen
    assert list(page.problems) == []                  # no refusal by the page's own security policy either
