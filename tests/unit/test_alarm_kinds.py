"""The kinds of detectors and alarms are listed once (the estimator's detectors); everything else derives from it."""

from __future__ import annotations

import re
from pathlib import Path

from estimator import DEFAULT_TIMING, DETECTOR_KINDS, DetectorKind
from service.config.alarm_settings import ALARM_KINDS, AlarmKind, default_priority

ROOT = Path(__file__).resolve().parents[2]

# A copy of the detector kinds: a literal list in any bracket, across lines, or members assigned the four names.
_LISTED = re.compile(r'[(\[{]\s*"noise_level"\s*,\s*"variance"\s*,\s*"offset"\s*,\s*"drift"\s*[,)\]}]'
                     r'|=\s*"noise_level"\s+\w+\s*=\s*"variance"\s+\w+\s*=\s*"offset"\s+\w+\s*=\s*"drift"')


def test_every_detector_kind_has_a_default_timing_and_every_alarm_kind_a_default_priority() -> None:
    assert set(DEFAULT_TIMING) == set(DETECTOR_KINDS)
    assert all(default_priority(kind) for kind in ALARM_KINDS)


def test_the_alarm_kinds_are_the_detector_kinds_and_staleness() -> None:
    assert [kind.value for kind in AlarmKind] == [*(kind.value for kind in DetectorKind), "stale"]
    assert tuple(AlarmKind) == ALARM_KINDS and tuple(DetectorKind) == DETECTOR_KINDS


def test_the_detector_kinds_are_written_out_in_one_place_only() -> None:
    found = [path.relative_to(ROOT).as_posix()
             for part in ("estimator", "service") for path in sorted((ROOT / part).rglob("*.py"))
             if _LISTED.search(path.read_text(encoding="utf-8"))]
    assert found == ["estimator/detection/detectors.py"]
