"""Service ingest, live, ``{"samples": [...]}`` payloads of 100 samples: the rate in samples/s against a goal of
its own, printed beside the raw paho rate of one-sample messages. A missed goal is followed by a cProfile of
the engine thread."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.benchmarks._environment import MachineUsage, header
from tests.benchmarks._figures import fmt
from tests.benchmarks._mqtt_load import Broker
from tests.benchmarks._profiles import print_profile
from tests.benchmarks._raw_paho import RawFigures
from tests.benchmarks._service_runs import check_service, report_ingest, service_live

pytestmark = pytest.mark.benchmark

BATCH_SIZE = 100                      # samples per batch payload
BATCH_MESSAGES = 6_000                # 600,000 samples: a few seconds at the goal rate
PROFILE_BATCH_MESSAGES = 600          # batch messages in a profiled run
GOAL_BATCH_RATE = 200_000.0           # samples per second


def test_service_ingest_rate_batched_payloads(bench_broker: Broker, raw: RawFigures, tmp_path: Path) -> None:
    usage = MachineUsage(bench_broker.pid)
    batched = service_live(bench_broker, tmp_path, messages=BATCH_MESSAGES, batch=BATCH_SIZE)
    met = batched["rate"] >= GOAL_BATCH_RATE
    report_ingest(batched, raw.live, raw, goal=f">= {GOAL_BATCH_RATE:,.0f}/s", met=met, broker=bench_broker,
                  usage=usage, store=tmp_path)
    if not met:
        profiled = service_live(bench_broker, tmp_path, messages=PROFILE_BATCH_MESSAGES, batch=BATCH_SIZE,
                                profile=True)
        header(f"profile (goal missed: {BATCH_SIZE} samples per message): {PROFILE_BATCH_MESSAGES:,} messages live, "
               "cProfile on the engine thread", bench_broker.description)
        print(f"   under cProfile: {fmt(profiled['rate'])} samples/s (unprofiled above: {fmt(batched['rate'])})")
        print_profile("engine thread (Engine._run)", profiled["profiles"].engine, profiled["expected"])
        check_service(profiled)
    check_service(batched)
