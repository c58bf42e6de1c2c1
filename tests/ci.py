"""Whether this run is CI's, and the pytest hooks that hold it to running every test.

Under ``CI=true`` (``.ci/run`` sets it) every test layer must run, so a skipped test or module fails; outside CI
the skipped tests are listed loudly at the end with their reasons. Registered by ``tests/conftest.py``.
"""

from __future__ import annotations

import os
from collections.abc import Iterator

import pytest

__all__ = ["in_ci", "pytest_make_collect_report", "pytest_runtest_makereport", "pytest_terminal_summary"]


def in_ci() -> bool:
    """True when the environment says ``CI`` is ``true`` (any case) or ``1``, as ``.ci/run`` sets it."""
    return os.environ.get("CI", "").strip().lower() in ("true", "1")


# ---------------------------------------------------------------- no silent skips
def _skip_reason(report: pytest.TestReport | pytest.CollectReport) -> str:
    longrepr = report.longrepr
    if isinstance(longrepr, tuple) and len(longrepr) == 3:
        return str(longrepr[2]).removeprefix("Skipped: ")
    return str(longrepr)


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item: pytest.Item, call: pytest.CallInfo[None]) -> Iterator[None]:
    """Under CI a skipped test fails: every layer must run there (an expected failure stays as it is)."""
    outcome = yield
    report = outcome.get_result()  # type: ignore[attr-defined]
    if report.skipped and in_ci() and not hasattr(report, "wasxfail"):
        report.outcome = "failed"
        report.longrepr = f"skipped under CI=true, where no test may skip: {_skip_reason(report)}"


@pytest.hookimpl(hookwrapper=True)
def pytest_make_collect_report(collector: pytest.Collector) -> Iterator[None]:
    """Under CI a module skipped at collection fails too."""
    outcome = yield
    report = outcome.get_result()  # type: ignore[attr-defined]
    if report.skipped and in_ci():
        report.outcome = "failed"
        report.longrepr = f"skipped under CI=true, where no test may skip: {_skip_reason(report)}"


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter) -> None:
    """Outside CI, skipped tests are listed loudly at the end, each with its reason: a layer never goes missing
    quietly."""
    skipped = terminalreporter.stats.get("skipped", [])
    if not skipped:
        return
    terminalreporter.write_sep("!", f"{len(skipped)} TEST(S) SKIPPED: these did not run", red=True, bold=True)
    for report in skipped:
        terminalreporter.write_line(f"SKIPPED {report.nodeid}: {_skip_reason(report)}", red=True, bold=True)
    terminalreporter.write_line("Under CI=true (.ci/run) each of these fails instead.", red=True, bold=True)
