"""Headless Chromium for the dashboard tests: Debian's /usr/bin/chromium driven by Playwright, never a
downloaded browser. Skipped without it, except under ``CI=true`` (``.ci/run`` installs it).

Every test's page records console errors and uncaught exceptions, and leaves a full-page screenshot in
``build/test-artifacts/browser/<test>.png``.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.ci import in_ci

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parents[2] / "build" / "test-artifacts" / "browser"
# The flags a root process in a closed network needs (no sandbox as root, no calls home).
FLAGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--disable-dev-shm-usage"]


@pytest.fixture(scope="session")
def chromium() -> Iterator[Any]:
    if not CHROMIUM.exists():
        if in_ci():
            pytest.fail("CI=true needs Debian's chromium at /usr/bin/chromium (.ci/run installs it)")
        pytest.skip("no /usr/bin/chromium")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM), args=FLAGS, headless=True)
        try:
            yield browser
        finally:
            browser.close()


class Problems(list[str]):
    """Console errors and page errors seen by one page."""


@pytest.fixture
def page(chromium: Any, request: pytest.FixtureRequest) -> Iterator[Any]:
    context = chromium.new_context(viewport={"width": 1400, "height": 1000})
    tab = context.new_page()
    problems = Problems()
    tab.on("console", lambda message: problems.append(f"console {message.type}: {message.text}")
           if message.type == "error" else None)
    tab.on("pageerror", lambda error: problems.append(f"page error: {error}"))
    tab.problems = problems
    try:
        yield tab
    finally:
        ARTIFACTS.mkdir(parents=True, exist_ok=True)
        name = re.sub(r"[^A-Za-z0-9_.-]+", "_", request.node.name)
        try:
            tab.screenshot(path=str(ARTIFACTS / f"{name}.png"), full_page=True)
        finally:
            context.close()
