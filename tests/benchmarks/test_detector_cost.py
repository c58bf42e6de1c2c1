"""Microseconds per channel-update of the detectors, before and after the noise-shape tables, in one run.

``DetectorBank.step`` for K channels at once (one sample each, as a round of
the bank gives it), on unit-variance Student t (3 dof) innovations:

* ``before``: the detectors as they were before the noise-shape tables
  (``estimator/detection/detectors.py`` at commit ``BEFORE``, loaded from the repository's
  history; the column is left out where git or that commit is not at hand);
* ``gaussian``: today's detectors with ``calibration_samples = 0`` (no table);
* ``calibrating``: today's, while the tables are being learned (linear binning);
* ``shaped``: today's, judging normal scores through a learned table (the default).

Issue goal: ``shaped`` at most 1.5 times ``before``. Timings are printed, never asserted.
"""

from __future__ import annotations

import importlib.util
import subprocess
import sys
import tempfile
from collections.abc import Callable
from pathlib import Path
from types import ModuleType

import numpy as np
import pytest

from estimator.detection.baseline import Baseline
from estimator.detection.detectors import DetectorBank, DetectorSettings
from tests.benchmarks._common import Budget, best_times, print_header, print_table

pytestmark = pytest.mark.benchmark

BEFORE = "9c82e5588a6c4aa60fe3b8b33e02669f8ca65418"
ROOT = Path(__file__).resolve().parents[2]
CHANNELS = (100, 1000, 10_000)
ROUNDS = 64                      # distinct rounds of innovations cycled through


def _before_module() -> ModuleType | None:
    """The detectors module of commit BEFORE, or None where it cannot be read."""
    try:
        source = subprocess.run(["git", "show", f"{BEFORE}:estimator/detection/detectors.py"], cwd=ROOT, check=True,
                                capture_output=True, text=True, timeout=30).stdout
    except (OSError, subprocess.SubprocessError):
        return None
    path = Path(tempfile.mkdtemp(prefix="rwls-bench-")) / "detectors_before.py"
    path.write_text(source, encoding="utf-8")
    spec = importlib.util.spec_from_file_location("detectors_before", path)
    if spec is None or spec.loader is None:
        return None
    module = importlib.util.module_from_spec(spec)
    sys.modules["detectors_before"] = module        # dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module


def _runner(bank: object, channels: int, eps: np.ndarray) -> Callable[[], object]:
    idx = np.arange(channels, dtype=np.intp)
    zeros, ones = np.zeros(channels), np.ones(channels)
    state = {"n": 0}

    def run() -> object:
        n = state["n"]
        state["n"] = n + 1
        out = bank.step(idx, np.full(channels, 10.0 * n), eps[n % ROUNDS], zeros, ones, ones)  # type: ignore[attr-defined]
        bank.sink.clear()                                                                      # type: ignore[attr-defined]
        return out

    return run


def _bank(settings_type: type, bank_type: type, channels: int, **settings: object) -> object:
    bank = bank_type([settings_type(**settings)] * channels, 2)
    for i in range(channels):
        bank.set_baseline(i, Baseline(1, "learned", np.zeros(2), np.zeros((2, 2)), 1.0, t=0.0))
    return bank


def test_detector_cost_per_channel_update(make_rng: Callable[[int], np.random.Generator]) -> None:
    before = _before_module()
    rows = []
    for channels in CHANNELS:
        eps = make_rng(channels).standard_t(3.0, size=(ROUNDS, channels)) / np.sqrt(3.0)
        banks: dict[str, object] = {}
        if before is not None:
            banks["before"] = _bank(before.DetectorSettings, before.DetectorBank, channels)
        banks["gaussian"] = _bank(DetectorSettings, DetectorBank, channels, calibration_samples=0)
        banks["calibrating"] = _bank(DetectorSettings, DetectorBank, channels, calibration_samples=10**9)
        shaped = _bank(DetectorSettings, DetectorBank, channels, calibration_samples=200)
        warm = _runner(shaped, channels, eps)
        for _ in range(200):                       # learn the tables first
            warm()
        banks["shaped"] = shaped
        times = best_times({name: _runner(bank, channels, eps) for name, bank in banks.items()},
                           Budget(min_time=0.3, max_calls=20_000, rounds=5))
        per = {name: 1e6 * seconds / channels for name, seconds in times.items()}
        base = per.get("before", per["gaussian"])
        rows.append([channels, *(f"{per[name]:.3f}" if name in per else "-" for name in
                                 ("before", "gaussian", "calibrating", "shaped")), f"{per['shaped'] / base:.2f}"])
    print_header("Detectors: microseconds per channel-update (DetectorBank.step, K channels per call)")
    print_table(["K", "before us", "gaussian us", "calibrating us", "shaped us", "shaped / before"], rows)
