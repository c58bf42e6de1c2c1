"""The bare paho subscriber's receive rate on the benchmarks' broker (``_raw_paho.py``), measured once a run and
printed beside every service ingest figure: QoS 1 with the broker's limits set must arrive whole; QoS 0 drops
are only reported."""

from __future__ import annotations

import pytest

from tests.benchmarks._raw_paho import RAW_MESSAGES, RawFigures

pytestmark = pytest.mark.benchmark


def test_raw_paho_receive_rate(raw: RawFigures) -> None:
    # QoS 1 with the limits set above must arrive whole; QoS 0 drops are only reported.
    for figures in (raw.live, raw.live_v311, raw.drain):
        assert figures["published"] == RAW_MESSAGES and figures["received"] >= RAW_MESSAGES, figures["how"]
    assert raw.live_qos0["published"] == RAW_MESSAGES
