"""The CI guard (tests/ci.py): under CI=true a skipped test or module fails; outside CI skips are listed loudly."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

SKIPPING = """
import pytest

def test_runs():
    assert True

def test_needs_a_widget():
    pytest.skip("no widget on this machine")
"""

SKIPPED_MODULE = """
import pytest
pytest.skip("no gadget here", allow_module_level=True)

def test_never():
    assert True
"""


def _run(tmp_path: Path, source: str, ci: str | None) -> subprocess.CompletedProcess[str]:
    test_file = tmp_path / "test_guarded.py"
    test_file.write_text(source)
    env = {k: v for k, v in os.environ.items() if k != "CI"}
    if ci is not None:
        env["CI"] = ci
    return subprocess.run([sys.executable, "-m", "pytest", "-p", "tests.ci", "-q", "-p", "no:cacheprovider",
                           "--rootdir", str(tmp_path), str(test_file)],
                          cwd=ROOT, env=env, capture_output=True, text=True, timeout=60, check=False)


@pytest.mark.parametrize("ci", ["true", "TRUE", "1"])
def test_a_skip_fails_under_ci(tmp_path: Path, ci: str) -> None:
    run = _run(tmp_path, SKIPPING, ci)
    assert run.returncode == 1, run.stdout
    assert "1 failed, 1 passed" in run.stdout
    assert "skipped under CI=true, where no test may skip: no widget on this machine" in run.stdout


def test_a_module_skipped_at_collection_fails_under_ci(tmp_path: Path) -> None:
    run = _run(tmp_path, SKIPPED_MODULE, "true")
    assert run.returncode != 0, run.stdout
    assert "no gadget here" in run.stdout


def test_outside_ci_a_skip_is_listed_loudly_with_its_reason(tmp_path: Path) -> None:
    run = _run(tmp_path, SKIPPING, None)
    assert run.returncode == 0, run.stdout
    assert "1 TEST(S) SKIPPED: these did not run" in run.stdout
    assert "test_guarded.py::test_needs_a_widget: no widget on this machine" in run.stdout
