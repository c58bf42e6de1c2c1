"""cProfile of the service's own threads, when a benchmark misses its goal: what takes the time."""

from __future__ import annotations

import contextlib
import cProfile
import pstats
import time
from pathlib import Path

from service.engine.writer import Engine
from service.runtime import Runtime
from tests.benchmarks._common import print_table

__all__ = ["ThreadProfiles", "print_profile", "print_thread_profiles"]

REPO = Path(__file__).parents[2]


class ThreadProfiles:
    """cProfile (CPU time of the thread, ``time.thread_time``) around the engine's and ingest's thread bodies.

    Installed before ``Runtime.start`` (the bodies are the threads' targets): no service code changes. The
    engine is built by ``start``, so its class's thread body is wrapped once, for the next engine that starts.
    """

    def __init__(self, runtime: Runtime) -> None:
        self.engine = cProfile.Profile(time.thread_time)
        self.ingest = cProfile.Profile(time.thread_time)
        self.ingest_title = "ingest thread: none"
        self._wrap_next_engine(self.engine)
        if runtime.ingest is not None:
            # In-process ingest: paho's loop; process ingest: the reader thread that feeds the engine.
            body = "_loop" if hasattr(runtime.ingest, "_loop") else "_read"
            self._wrap(runtime.ingest, body, self.ingest)
            self.ingest_title = (f"ingest thread ({type(runtime.ingest).__name__}.{body}: "
                                 f"{'paho in this process' if body == '_loop' else 'reads the paho child'})")

    @staticmethod
    def _wrap_next_engine(profile: cProfile.Profile) -> None:
        body = Engine._run

        def profiled(engine: Engine) -> None:
            Engine._run = body                   # type: ignore[method-assign]  # one engine only
            profile.enable()
            try:
                body(engine)
            finally:
                profile.disable()

        Engine._run = profiled                   # type: ignore[method-assign]

    @staticmethod
    def _wrap(owner: object, name: str, profile: cProfile.Profile) -> None:
        body = getattr(owner, name)

        def profiled() -> None:
            profile.enable()
            try:
                body()
            finally:
                profile.disable()

        setattr(owner, name, profiled)


def label(func: tuple[str, int, str]) -> str:
    filename, line, name = func
    if filename == "~":
        return name
    path = Path(filename)
    with contextlib.suppress(ValueError):
        return f"{path.relative_to(REPO)}:{line}({name})"
    return f"{path.parent.name}/{path.name}:{line}({name})"


def print_thread_profiles(profiles: ThreadProfiles, count: int, unit: str = "sample", top: int = 16) -> None:
    """The engine's profile, then the ingest thread's, each per ``unit`` (``count`` of them in the run). The
    engine's includes its start (the retained alarm states it publishes first), which no message causes."""
    print_profile("engine thread (Engine._run)", profiles.engine, count, unit, top)
    print_profile(profiles.ingest_title, profiles.ingest, count, unit, top)


def print_profile(title: str, profile: cProfile.Profile, count: int, unit: str = "sample", top: int = 16) -> None:
    """What took a thread's CPU time, by own and by cumulative time; the total per ``unit`` (``count`` of them)."""
    stats = pstats.Stats(profile).stats  # type: ignore[attr-defined]
    total = sum(entry[2] for entry in stats.values())
    if total <= 0:
        print(f"   {title}: nothing recorded")
        return
    print(f"   {title}: {total:.2f} s thread CPU ({total / max(count, 1) * 1e6:.1f} us per {unit} under cProfile);"
          " by own time (cumulative beside):")
    ordered = sorted(stats.items(), key=lambda item: item[1][2], reverse=True)[:top]
    rows = [[f"{entry[2] / total:.1%}", f"{min(entry[3] / total, 1.0):.1%}", f"{entry[1]:,}", label(func)]
            for func, entry in ordered]
    print_table(["own", "cumulative", "calls", "function"], rows)
    print(f"   {title}: by cumulative time (own beside):")
    ordered = sorted(stats.items(), key=lambda item: item[1][3], reverse=True)[:top]
    rows = [[f"{min(entry[3] / total, 1.0):.1%}", f"{entry[2] / total:.1%}", f"{entry[1]:,}", label(func)]
            for func, entry in ordered]
    print_table(["cumulative", "own", "calls", "function"], rows)
