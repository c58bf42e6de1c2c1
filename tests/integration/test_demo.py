"""`rwls demo` comes up on its own: embedded broker, simulated plant, service; channels appear and move."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from typing import Any

import pytest

pytestmark = pytest.mark.integration

DEMO_CHANNELS = 6            # service/demo.py's DEMO_CHANNELS_TOML: four with faults, two healthy non-Gaussian


def _get(url: str) -> Any:
    with urllib.request.urlopen(url, timeout=5) as response:   # loopback only
        return json.loads(response.read())


def test_demo_comes_up_and_its_parameters_move(tmp_path: Path) -> None:
    rwls = Path(sys.executable).with_name("rwls")
    process = subprocess.Popen([str(rwls), "demo", "--port", "0", "--rate", "200", "--exit-after", "40",
                                "--data-dir", str(tmp_path / "demo")],
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        url = None
        deadline = time.monotonic() + 20
        while url is None and time.monotonic() < deadline:
            line = process.stdout.readline() if process.stdout else ""
            match = re.search(r"service at (http://127\.0\.0\.1:\d+)/", line)
            url = match.group(1) if match else None
        assert url is not None, "the demo did not print its URL"

        first: dict[str, Any] = {}
        deadline = time.monotonic() + 25
        while time.monotonic() < deadline:
            try:
                channels = _get(f"{url}/api/v1/channels")
            except OSError:              # printed before uvicorn listens: try again shortly
                time.sleep(0.3)
                continue
            if len(channels) == DEMO_CHANNELS and all(c["samples"] >= 50 for c in channels):
                first = _get(f"{url}/api/v1/snapshot")
                break
            time.sleep(0.5)
        assert first, "the demo channels did not fill with samples"
        time.sleep(2.0)
        second = _get(f"{url}/api/v1/snapshot")
        assert second["version"] > first["version"]
        moved = [cid for cid in first["channels"]
                 if first["channels"][cid]["parameters"] != second["channels"][cid]["parameters"]]
        assert len(moved) == DEMO_CHANNELS, f"parameters did not move on {set(first['channels']) - set(moved)}"
        gain = second["channels"]["sub7.flow"]["parameters"]["pump_speed"]
        assert gain is not None and 40.0 < gain < 70.0      # the invented flowmeter's gain is 55
        assert "advisory" in urllib.request.urlopen(f"{url}/", timeout=5).read().decode().lower()
    finally:
        if process.poll() is None:
            process.terminate()          # our own child, by PID
            try:
                process.wait(15)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(5)
        if process.stdout is not None:
            process.stdout.close()
