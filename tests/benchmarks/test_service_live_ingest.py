"""Service ingest, live, one sample per message: the service (``Runtime``: MQTT ingest + engine, 1000 channels
``["1", "u"]``) fed while the publisher runs; samples/s from the first message handed over by paho to the last
sample applied, beside the raw QoS 1 rate measured the same way. A missed goal is followed by a cProfile of the
engine and paho threads."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.benchmarks._environment import MachineUsage
from tests.benchmarks._mqtt_load import Broker
from tests.benchmarks._raw_paho import RawFigures
from tests.benchmarks._service_runs import (
    SERVICE_MESSAGES,
    check_service,
    profile_live,
    ratio_goal,
    report_ingest,
    service_live,
)

pytestmark = pytest.mark.benchmark


def test_service_ingest_rate_live_one_sample_per_message(bench_broker: Broker, raw: RawFigures,
                                                          tmp_path: Path) -> None:
    usage = MachineUsage(bench_broker.pid)
    single = service_live(bench_broker, tmp_path, messages=SERVICE_MESSAGES, batch=1)
    goal, met = ratio_goal(single, raw.live["rate"])
    report_ingest(single, raw.live, raw, goal=goal, met=met, broker=bench_broker, usage=usage, store=tmp_path)
    if not met:
        profile_live(bench_broker, tmp_path, single)
    check_service(single)
