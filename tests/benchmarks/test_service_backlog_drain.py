"""Service ingest from a backlog: the broker queues one-sample messages for the service's persistent session
while it is away; a new ``Runtime`` with the same client id drains them. samples/s beside the raw paho
subscriber's own backlog drain. A missed goal is followed by a cProfile of a live one-sample run (the same
code path)."""

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
    service_drain,
)

pytestmark = pytest.mark.benchmark


def test_service_ingest_rate_backlog_drain(bench_broker: Broker, raw: RawFigures, tmp_path: Path) -> None:
    usage = MachineUsage(bench_broker.pid)
    drained = service_drain(bench_broker, tmp_path, messages=SERVICE_MESSAGES)
    goal, met = ratio_goal(drained, raw.drain["rate"])
    report_ingest(drained, raw.drain, raw, goal=goal, met=met, broker=bench_broker, usage=usage, store=tmp_path)
    if not met:
        profile_live(bench_broker, tmp_path, drained)
    check_service(drained)
