"""The kinds of detectors and alarms are listed once (the estimator's detectors); everything else derives from it."""

from __future__ import annotations

import re
from pathlib import Path

from estimator import DEFAULT_TIMING, DETECTOR_KINDS
from service.config.alarm_settings import ALARM_KINDS, default_priority

ROOT = Path(__file__).resolve().parents[2]

# A literal list of the detector kinds, in any bracket, across lines: what a copy would look like.
_LISTED = re.compile(r'[(\[{]\s*"noise_level"\s*,\s*"variance"\s*,\s*"offset"\s*,\s*"drift"\s*[,)\]}]')


def test_every_detector_kind_has_a_default_timing_and_every_alarm_kind_a_default_priority() -> None:
    assert set(DEFAULT_TIMING) == set(DETECTOR_KINDS)
    assert all(default_priority(kind) for kind in ALARM_KINDS)


def test_the_detector_kinds_are_written_out_in_one_place_only() -> None:
    found = [path.relative_to(ROOT).as_posix()
             for part in ("estimator", "service") for path in sorted((ROOT / part).rglob("*.py"))
             if _LISTED.search(path.read_text(encoding="utf-8"))]
    assert found == ["estimator/detection/detectors.py"]
