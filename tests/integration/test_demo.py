"""`rwls demo` comes up on its own (embedded broker, simulated plant, service), its channels move on every run,
the second run included, and a healthy start logs no warning. The plant publishes its tags and the service
assembles every channel from them."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import threading
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.demo.instruments import CHANNELS as DEMO_CHANNELS
from tests.support.child_processes import service_environment
from tests.support.waits import wait_until

pytestmark = pytest.mark.integration

CHANNELS = {channel.channel for channel in DEMO_CHANNELS}
# What may keep a sample from forming in the demo: the return probe's weekly check, nothing else. An input
# delivered after its output (messages reordered on the way) would show as input_stale (max_age 300 s is half
# a scan) or input_missing.
EXPECTED_NOT_FORMED = {("sub7.return_temp", "input_bad_quality")}


def _get(url: str) -> Any:
    with urllib.request.urlopen(url, timeout=5) as response:   # loopback only
        return json.loads(response.read())


class _Demo:
    """A running ``rwls demo`` child: its URL and every line it printed so far."""

    def __init__(self, process: subprocess.Popen[str]) -> None:
        self.process = process
        self.lines: list[str] = []
        self.url: str | None = None
        self._found = threading.Event()
        threading.Thread(target=self._read, name="demo-output", daemon=True).start()

    def _read(self) -> None:
        assert self.process.stdout is not None
        for line in self.process.stdout:
            self.lines.append(line.rstrip("\n"))
            match = re.search(r"service at (http://127\.0\.0\.1:\d+)/", line)
            if match and self.url is None:
                self.url = match.group(1)
                self._found.set()

    def wait_url(self, timeout: float) -> str:
        assert self._found.wait(timeout), "the demo did not print its URL:\n" + "\n".join(self.lines)
        assert self.url is not None
        return self.url


@contextmanager
def _demo(data_dir: Path) -> Iterator[_Demo]:
    rwls = Path(sys.executable).with_name("rwls")
    process = subprocess.Popen([str(rwls), "demo", "--port", "0", "--rate", "200", "--exit-after", "60",
                                "--data-dir", str(data_dir)],
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=service_environment())
    try:
        yield _Demo(process)
    finally:
        if process.poll() is None:
            process.terminate()          # our own child, by PID: a clean stop writes the final checkpoint
            try:
                process.wait(20)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(5)
        if process.stdout is not None:
            process.stdout.close()



def _assert_moving(url: str, more_than: dict[str, int]) -> dict[str, int]:
    """Every demo channel gains samples past ``more_than`` and its parameters change; returns the counts."""
    def filled() -> dict[str, Any] | None:
        channels = _get(f"{url}/api/v1/channels")
        if {c["id"] for c in channels} == CHANNELS and all(
                c["samples"] >= more_than.get(c["id"], 0) + 50 for c in channels):
            return _get(f"{url}/api/v1/snapshot")
        return None

    first = wait_until(filled, 30.0, "the demo channels to fill with new samples")

    def moved() -> dict[str, Any] | None:
        later = _get(f"{url}/api/v1/snapshot")
        changed = {cid for cid in CHANNELS
                   if later["channels"][cid]["parameters"] != first["channels"][cid]["parameters"]}
        return later if changed == CHANNELS else None

    second = wait_until(moved, 20.0, "the parameters of every demo channel to move")
    for cid in CHANNELS:
        assert second["channels"][cid]["quality"] != "Bad", cid
        assert second["channels"][cid]["quality_reason"] != "samples_refused", cid
    gain = second["channels"]["sub7.flow"]["parameters"]["pump_speed"]
    assert gain is not None and 40.0 < gain < 70.0      # the invented flowmeter's gain is 55
    return {cid: entry["samples"] for cid, entry in second["channels"].items()}


def _metrics(url: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    with urllib.request.urlopen(f"{url}/metrics", timeout=5) as response:   # loopback only
        text = response.read().decode()
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(text) for s in family.samples}


def _assert_on_tags(url: str) -> None:
    """The channels were assembled from tag messages: more messages than samples, every tag named by a channel,
    no sample lost but to the probe's check, and the level (published by exception) has fewer samples."""
    metrics = _metrics(url)
    samples = {c["id"]: c["samples"] for c in _get(f"{url}/api/v1/channels")}
    assert metrics[("rwls_messages_total", ())] > sum(samples.values())
    assert metrics[("rwls_tag_updates_unused_total", ())] == 0.0
    not_formed = {(dict(labels)["channel"], dict(labels)["reason"])
                  for (name, labels), value in metrics.items() if name == "rwls_samples_not_formed_total" and value}
    assert not_formed <= EXPECTED_NOT_FORMED, not_formed
    assert samples["sub7.level"] < 0.9 * samples["sub7.flow"], samples


def _noisy_lines(lines: list[str]) -> list[str]:
    return [line for line in lines if re.search(r"\b(WARNING|ERROR|CRITICAL)\b|Traceback", line)]


def test_demo_moves_on_its_first_and_its_second_run_and_starts_quietly(tmp_path: Path) -> None:
    data_dir = tmp_path / "demo"
    with _demo(data_dir) as demo:
        url = demo.wait_url(20.0)
        counts = _assert_moving(url, {})
        _assert_on_tags(url)
        assert "advisory" in urllib.request.urlopen(f"{url}/", timeout=5).read().decode().lower()
    assert demo.process.returncode is not None
    assert not _noisy_lines(demo.lines), "\n".join(demo.lines)

    # The same data directory again: the state is recovered and the plant carries on after it.
    with _demo(data_dir) as again:
        url = again.wait_url(20.0)
        listed = wait_until(lambda: _get(f"{url}/api/v1/channels"), 20.0, "the service to answer")
        recovered = {c["id"]: c["samples"] for c in listed}
        assert all(recovered[cid] >= counts[cid] for cid in CHANNELS), (recovered, counts)
        _assert_moving(url, recovered)
        _assert_on_tags(url)
        refused = {cid: _get(f"{url}/api/v1/channels/{cid}")["rejected"] for cid in sorted(CHANNELS)}
        assert set(refused.values()) == {0}, f"the second run's plant repeated samples the service held: {refused}"
    assert any("the plant carries on after" in line for line in again.lines), "\n".join(again.lines)
    assert any("plant publishing its tags" in line for line in demo.lines), "\n".join(demo.lines)
    assert not _noisy_lines(again.lines), "\n".join(again.lines)


def test_demo_on_a_taken_port_says_so_in_one_line(tmp_path: Path) -> None:
    import socket

    holder = socket.socket()
    holder.bind(("127.0.0.1", 0))
    holder.listen()
    port = holder.getsockname()[1]
    try:
        rwls = Path(sys.executable).with_name("rwls")
        run = subprocess.run([str(rwls), "demo", "--port", str(port), "--data-dir", str(tmp_path / "d")],
                             capture_output=True, text=True, timeout=60, check=False, env=service_environment())
    finally:
        holder.close()
    assert run.returncode == 2
    assert "Traceback" not in run.stderr
    lines = [line for line in run.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, run.stderr
    assert f"port {port} on 127.0.0.1 is already in use" in lines[0]
    assert "--port 0" in lines[0] and "http.port" in lines[0]
