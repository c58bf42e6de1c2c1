"""The offline what-if drives the live alarm feed on sample time: design suppression applies as it does live."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from estimator import ChannelBank, Sample
from service.alarms.lifecycle import AlarmBook, JournalEntry
from service.alarms.what_if import WhatIf
from service.broker_link.messages import Message
from service.config.settings import RwlsConfig, parse_config
from service.engine.writer import Engine
from service.offline.replay import replay_file
from service.offline.tables import render_text

T0 = 1_780_000_000.0        # seconds, UTC: the first sample's time
CHANNEL = "c"

# The drift alarm is raised, and then the estimates lose the excitation the drift test needs: the live feed
# suppresses the standing drift alarm by design until the test can judge again. A fast forgetting factor and
# a generous covariance limit let the information along u fade within a few hundred samples of constant u.
CONFIG = {"channels": {CHANNEL: {
    "terms": ["1", "u"], "forgetting_factor": 0.95, "covariance_limit": 1e15,
    "detectors": {"commissioning_samples": 100, "calibration_samples": 0, "drift": {"every": 5}}}}}


def _history() -> list[tuple[float, float, float]]:
    """(t, u, y) rows, one a second: commissioning, a gain change, constant u, and excitation again."""
    rng = np.random.default_rng(3)
    rows = []
    t = T0
    for count, gain, constant in ((300, 0.5, None), (100, 0.6, None), (2000, 0.6, 0.3), (300, 0.6, None)):
        for _ in range(count):
            u = float(rng.uniform(-1.0, 1.0)) if constant is None else constant
            rows.append((t, u, 1.0 + gain * u + 0.01 * float(rng.standard_normal())))
            t += 1.0
    return rows


def _offline(config: RwlsConfig, rows: list[tuple[float, float, float]]) -> WhatIf:
    """As ``rwls replay`` runs it: configured baselines, then every applied sample observed."""
    bank = ChannelBank(config.channel_settings())
    config.apply_baselines(bank)
    what_if = WhatIf(config)
    what_if.start(bank)
    for t, u, y in rows:
        if bank.apply_one(Sample(CHANNEL, y, {"u": u}, t)).status == "applied":
            what_if.observe(bank, CHANNEL, t)
    return what_if


def _live(config: RwlsConfig, rows: list[tuple[float, float, float]], per_message: int) -> list[JournalEntry]:
    """The service's engine with its alarm book, fed the same samples as MQTT batch messages."""
    book = AlarmBook({cid: ch.priorities() for cid, ch in config.channels.items()})
    # The wall clock stands at the first sample's time: the start-up hold is journaled then, and no channel
    # is ever silent long enough to be stale.
    engine = Engine(config.channel_settings(), alarms=book, prepare=config.apply_baselines,
                    stale_after=config.alarms.stale_after, clock=lambda: T0)
    engine.start()
    try:
        for k in range(0, len(rows), per_message):
            body = {"samples": [{"t": t, "y": y, "u": {"u": u}} for t, u, y in rows[k:k + per_message]]}
            assert engine.submit(Message(CHANNEL, json.dumps(body).encode(), "mqtt", received=T0), timeout=10.0)
        assert engine.drain(timeout=60.0)
    finally:
        engine.stop()
    return list(book.journal)


@pytest.mark.parametrize("per_message", [1, 50])
def test_live_and_offline_journal_the_same_transitions_for_the_same_samples(per_message: int) -> None:
    config = parse_config(CONFIG)
    rows = _history()
    offline = _offline(config, rows).journal
    live = _live(config, rows, per_message)
    assert [e.to_dict() for e in offline] == [e.to_dict() for e in live]
    # Not an empty agreement: commissioning held and released, the drift raised, suppressed and released.
    actions = {(e.kind, e.action) for e in live}
    assert {("drift", "suppress"), ("drift", "release"), ("drift", "condition_on"), ("offset", "release")} <= actions


def test_replay_lists_the_drift_alarm_suppressed_while_the_estimates_cannot_be_judged(tmp_path: Path) -> None:
    rows = _history()
    path = tmp_path / "history.csv"
    path.write_text("t,y,u\n" + "".join(f"{t!r},{y!r},{u!r}\n" for t, u, y in rows))
    result = replay_file(path, parse_config(CONFIG), show_progress=False)
    alarms = result.to_json()["channels"][CHANNEL]["alarms"]
    drift = [(a["action"], a["state"]) for a in alarms if a["kind"] == "drift"]
    # Before, the what-if fed only the conditions to its book: the drift alarm stayed Unacknowledged all
    # through the stretch of constant u, which the live service shows as suppressed by design.
    assert drift[:3] == [("condition_on", "Unacknowledged"), ("suppress", "Suppressed by design"),
                         ("release", "Unacknowledged")]
    suppressed = next(a for a in alarms if a["action"] == "suppress")
    assert suppressed["reason"] == "not judged: too little excitation"
    raised = next(a for a in alarms if a["kind"] == "drift")
    assert T0 < raised["t"] < suppressed["t"]       # on sample time, in order
    # The commissioning hold and its release changed nothing an operator sees: not listed.
    assert all(a["state"] != "Suppressed by design" or a["kind"] == "drift" for a in alarms)
    assert not [a for a in alarms if a.get("reason", "").startswith(("commissioning", "baseline"))]
    assert "(not judged: too little excitation)" in render_text(result, "replay")
