"""What the service benchmarks' figures were measured on and beside: the software, how busy the machine was with
other work, and the CPU time of single threads and processes (from ``/proc``)."""

from __future__ import annotations

import math
import os
from pathlib import Path

import fastapi
import httpx
import paho.mqtt
import uvicorn

from tests.benchmarks._common import print_header

__all__ = ["MachineUsage", "header", "process_cpu", "thread_cpu"]


def header(what: str, broker: str, usage: MachineUsage | None = None) -> None:
    print_header(what)
    if usage is not None:
        print(f"   {usage.line()}")
    print(f"   paho-mqtt {paho.mqtt.__version__} | fastapi {fastapi.__version__} | uvicorn {uvicorn.__version__} | "
          f"httpx {httpx.__version__} | broker: {broker}")


class MachineUsage:
    """CPU seconds the whole machine was busy (``/proc/stat``) against those of this benchmark's processes.

    Ours: this process, its waited-for children (publisher, poller) and the broker. The rest is other work
    sharing the machine, which slows the figures down.
    """

    def __init__(self, broker_pid: int | None = None) -> None:
        self._broker_pid = broker_pid
        self._start = self._read()

    def _read(self) -> tuple[float, float, float, float]:
        fields = [int(x) for x in Path("/proc/stat").read_text().splitlines()[0].split()[1:9]]
        tick = os.sysconf("SC_CLK_TCK")
        busy = (fields[0] + fields[1] + fields[2] + fields[5] + fields[6] + fields[7]) / tick
        total = busy + (fields[3] + fields[4]) / tick
        times = os.times()
        broker = process_cpu(self._broker_pid) if self._broker_pid is not None else 0.0
        return busy, total, times.user + times.system + times.children_user + times.children_system, broker

    def line(self) -> str:
        busy, total, ours, broker = (b - a for a, b in zip(self._start, self._read(), strict=True))
        mine = ours + (broker if math.isfinite(broker) else 0.0)
        return (f"machine during this test: {busy:.1f} of {total:.1f} CPU-s busy ({os.cpu_count()} CPUs); this "
                f"benchmark's processes {mine:.1f}, other work about {max(busy - mine, 0.0):.1f} (tick resolution)")


def thread_cpu(native_id: int | None) -> float:
    """On-CPU seconds of one thread of this process (``/proc/self/task/<tid>/schedstat``), NaN if unknown."""
    if native_id is None:
        return math.nan
    try:
        return int(Path(f"/proc/self/task/{native_id}/schedstat").read_text().split()[0]) / 1e9
    except (OSError, ValueError, IndexError):
        return math.nan


def process_cpu(pid: int | None) -> float:
    """User + system CPU seconds of a process (``/proc/<pid>/stat``), NaN if unknown."""
    if pid is None:
        return math.nan
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rpartition(")")[2].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return math.nan
