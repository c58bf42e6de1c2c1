"""``rwls replay --json`` and ``rwls fit --json`` against a bare per-row numpy RLS loop over the same rows.

Issue 15's table, one run: wide CSV histories of ``y = 1 + 2 load + noise`` (terms ``["1", "load"]``,
tracked weights, detectors on as configured by default), one row a minute per channel, rows interleaved
across channels in time order:

* 10 channels x 100,000 samples (1,000,000 rows): replay, fit and a replay sweep of three forgetting
  factors (each in its own process: wall time and peak resident memory), the exact path of before
  (every sample alone through ``ChannelBank.apply_one``, ``exact=True``) on the first tenth of the
  rows, and the bare loop;
* 1,000 channels x 10,000 samples (10,000,000 rows): replay's time and peak resident memory;
* 1 channel x 1,000,000 samples: the sequential limit (one channel cannot be vectorised across channels).

The bare loop (the simplest thing a user could write instead): the csv module reads each row, and a
covariance-form RLS update in numpy per row (``P z``, gain, ``theta``, ``P``), no checks, no tracker, no
detectors. It runs in this process on the same file, so every figure has its peer of the same run.
``BENCH_REPLAY_FRACTION`` (default 1) scales every case's samples per channel, for a quicker look.
Timings are printed, never asserted; the bare loop's estimates are checked against replay's so that the
two solve the same problem.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from tests.benchmarks._common import RESYMMETRISE_EVERY, print_header, print_table
from tests.support.child_processes import service_environment

pytestmark = pytest.mark.benchmark

ROOT = Path(__file__).resolve().parents[2]
FRACTION = float(os.environ.get("BENCH_REPLAY_FRACTION", "1"))
LAMBDA = 0.999                    # forgetting factor of every channel (memory about 1,000 samples)


def _write_history(path: Path, channels: int, samples: int) -> int:
    """The wide CSV and its configuration (``path`` + ``.toml``); returns the rows written."""
    rng = np.random.default_rng(7)
    names = np.array([f"c{k}" for k in range(channels)])
    with path.open("w") as out:
        out.write("t,channel,y,load\n")
        block = max(1, 200_000 // channels)              # samples per channel written at once
        for start in range(0, samples, block):
            count = min(block, samples - start)
            t = 1.78e9 + np.repeat((start + np.arange(count)) * 60.0, channels)
            load = rng.uniform(0.2, 1.0, t.size)
            y = 1.0 + 2.0 * load + rng.normal(0.0, 0.05, t.size)
            ch = np.tile(names, count)
            out.writelines(f"{a:.0f},{c},{b:.6f},{u:.6f}\n"
                           for a, c, b, u in zip(t.tolist(), ch.tolist(), y.tolist(), load.tolist(), strict=True))
    Path(f"{path}.toml").write_text("".join(
        f'[channels.c{k}]\nterms = ["1", "load"]\nforgetting_factor = {LAMBDA}\nweighting = "tracked"\n\n'
        for k in range(channels)))
    return channels * samples


def _bare_loop(path: Path) -> tuple[float, dict[str, np.ndarray]]:
    """Seconds, and each channel's estimates, of the per-row covariance-form RLS over the file."""
    start = time.perf_counter()
    theta: dict[str, np.ndarray] = {}
    P: dict[str, np.ndarray] = {}
    with path.open(newline="") as handle:
        rows = csv.reader(handle)
        next(rows)
        for k, (_, channel, y_text, load_text) in enumerate(rows):
            if channel not in theta:
                theta[channel] = np.zeros(2)
                P[channel] = np.eye(2) * 1e6
            z = np.array([1.0, float(load_text)])
            Pz = P[channel] @ z
            gain = Pz / (LAMBDA + z @ Pz)                                    # K = P z / (lambda + z' P z)
            theta[channel] = theta[channel] + gain * (float(y_text) - z @ theta[channel])
            P[channel] = (P[channel] - np.outer(gain, Pz)) / LAMBDA          # P = (P - K z' P) / lambda
            if k % RESYMMETRISE_EVERY == 0:
                # Rounding makes P drift from symmetry, and covariance-form RLS then diverges over long
                # runs (common practice: re-symmetrise now and then, as the peers in _common do).
                for channel_P in P.values():
                    channel_P[...] = 0.5 * (channel_P + channel_P.T)
    return time.perf_counter() - start, theta


def _run_cli(command: str, path: Path, *extra: str) -> tuple[float, float, dict[str, object]]:
    """Wall seconds, peak resident MiB and the JSON of ``rwls <command> --json`` in its own process."""
    env = {**service_environment(), "PYTHONPATH": str(ROOT)}
    out_path, err_path = path.with_suffix(".out.json"), path.with_suffix(".err.txt")
    with out_path.open("wb") as out, err_path.open("wb") as err:
        start = time.perf_counter()
        child = subprocess.Popen([sys.executable, "-m", "service.cli", command, str(path), "-c", f"{path}.toml",
                                  "--json", "--no-progress", *extra], stdout=out, stderr=err, env=env, cwd=ROOT)
        _, status, usage = os.wait4(child.pid, 0)          # this child's own peak resident memory
        seconds = time.perf_counter() - start
    child.returncode = os.waitstatus_to_exitcode(status)
    assert child.returncode == 0, f"rwls {command} exited {child.returncode}: {err_path.read_text()[-500:]}"
    document = json.loads(out_path.read_text())
    out_path.unlink()
    return seconds, usage.ru_maxrss / 1024.0, document


def _exact_replay(path: Path, rows: int) -> float:
    """Seconds of the exact path of before over the first ``rows`` rows (a file of its own)."""
    from service.config.settings import load_config
    from service.offline.replay import replay_file

    head = path.with_name(path.stem + "_head.csv")
    with path.open() as source, head.open("w") as out:
        for k, line in enumerate(source):
            if k > rows:
                break
            out.write(line)
    config = load_config(f"{path}.toml", environ={})
    start = time.perf_counter()
    replay_file(head, config, show_progress=False, exact=True)
    return time.perf_counter() - start


def _us(seconds: float, rows: int) -> str:
    return f"{seconds / rows * 1e6:.1f}"


def _agree(document: dict[str, object], theta: dict[str, np.ndarray]) -> None:
    channels = document["channels"]
    assert isinstance(channels, dict)
    for cid, estimate in theta.items():
        # Same model, same data; the tracked weights and the robust square-root form differ from the bare
        # loop, so the two agree to the noise's order (0.05 sd, ~100,000 samples), not to the bit.
        np.testing.assert_allclose(list(channels[cid]["parameters"].values()), estimate, atol=0.05)


def test_replay_and_fit_against_the_bare_loop(tmp_path: Path) -> None:
    table: list[list[object]] = []
    cases = ((10, 100_000, True), (1_000, 10_000, False), (1, 1_000_000, False))
    for channels, samples, full in cases:
        samples = max(100, int(samples * FRACTION))
        path = tmp_path / f"history_{channels}x{samples}.csv"
        rows = _write_history(path, channels, samples)
        bare, theta = _bare_loop(path)
        replay_s, replay_mib, document = _run_cli("replay", path)
        _agree(document, theta)
        size = f"{channels:,} x {samples:,}"
        table.append([size, "replay --json", f"{replay_s:.1f}", _us(replay_s, rows), f"{replay_mib:.0f}",
                      f"{bare:.1f}", f"{replay_s / bare:.2f}"])
        if full:
            fit_s, fit_mib, _ = _run_cli("fit", path)
            table.append([size, "fit --json", f"{fit_s:.1f}", _us(fit_s, rows), f"{fit_mib:.0f}",
                          f"{bare:.1f}", f"{fit_s / bare:.2f}"])
            sweep_s, sweep_mib, _ = _run_cli("replay", path, "--forgetting-factor", "0.99,0.995,0.999")
            table.append([size, "replay --json, sweep of 3 forgetting factors", f"{sweep_s:.1f}",
                          _us(sweep_s, rows), f"{sweep_mib:.0f}", f"{bare:.1f}", f"{sweep_s / bare:.2f}"])
            table.append([size, "  (the sweep against 2 single replays)", "-", "-", "-", "-",
                          f"{sweep_s / (2 * replay_s):.2f}"])
            head = rows // 10
            exact_s = _exact_replay(path, head)
            bare_head = bare * head / rows
            table.append([size, f"exact path (before), first {head:,} rows", f"{exact_s:.1f}", _us(exact_s, head),
                          "-", f"{bare_head:.1f} (pro rata)", f"{exact_s / bare_head:.2f}"])
        path.unlink()
    print_header("rwls replay / fit against a bare per-row numpy RLS loop over the same CSV rows "
                 f"(samples per channel x {FRACTION:g})")
    print_table(["channels x samples", "run", "wall s", "us/row", "peak RSS MiB", "bare loop s", "x bare loop"],
                table)
