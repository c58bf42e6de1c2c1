"""The estimator package stays pure numpy: no service, network, files, clock, environment or logging."""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[2] / "estimator"
SOURCES = sorted(PACKAGE.rglob("*.py"))

# Top-level modules the estimator must never import: it never depends on the service layer, and it
# does no I/O (the direction of dependencies of this project).
FORBIDDEN_IMPORTS = {
    "service", "fastapi", "paho", "pydantic", "uvicorn",      # the service layer
    "logging",                                                # the estimator returns or raises
    "time", "os", "sys", "socket", "asyncio", "threading", "subprocess", "sqlite3",
    "io", "pathlib", "shutil", "tempfile", "urllib", "http",  # clock, environment, files, network
    "random",                                                 # global random state
}
# Builtins that do I/O.
FORBIDDEN_CALLS = {"open", "print", "input"}
# numpy functions that touch files or the global random state.
FORBIDDEN_NUMPY = {"load", "save", "savez", "savez_compressed", "loadtxt", "savetxt", "genfromtxt",
                   "fromfile", "memmap"}


def _imports(tree: ast.AST) -> set[str]:
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            found.add(node.module.split(".")[0])
    return found


def _dotted(node: ast.expr) -> str:
    parts = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if isinstance(node, ast.Name):
        parts.append(node.id)
    return ".".join(reversed(parts))


def _bad_calls(tree: ast.AST) -> list[str]:
    bad = []
    for node in ast.walk(tree):
        if not isinstance(node, ast.Call):
            continue
        name = _dotted(node.func)
        head, _, tail = name.partition(".")
        is_numpy_io = head in ("np", "numpy") and (tail in FORBIDDEN_NUMPY or tail.startswith("random."))
        if name in FORBIDDEN_CALLS or name.endswith(".tofile") or is_numpy_io:
            bad.append(name)
    return bad


def test_the_scan_sees_every_estimator_module() -> None:
    names = {path.name for path in SOURCES}
    assert {"__init__.py", "rwls.py", "_givens.py", "regressors.py", "batch.py", "statistics.py"} <= names


@pytest.mark.parametrize("path", SOURCES, ids=[str(p.relative_to(PACKAGE)) for p in SOURCES])
def test_estimator_module_imports_nothing_from_the_outside_world(path: Path) -> None:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    assert _imports(tree) & FORBIDDEN_IMPORTS == set()


@pytest.mark.parametrize("path", SOURCES, ids=[str(p.relative_to(PACKAGE)) for p in SOURCES])
def test_estimator_module_opens_no_files_and_uses_no_global_random_state(path: Path) -> None:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    assert _bad_calls(tree) == []


def test_the_scan_flags_what_it_is_meant_to_flag() -> None:
    # The scan itself can fail: a module doing every forbidden thing is caught.
    tree = ast.parse(
        "import os, logging.config\nfrom service.api.app import app\nimport numpy as np\n"
        "open('x')\nnp.load('y')\nnp.random.seed(1)\narr.tofile('z')\n")
    assert _imports(tree) & FORBIDDEN_IMPORTS == {"os", "logging", "service"}
    assert _bad_calls(tree) == ["open", "np.load", "np.random.seed", "arr.tofile"]


def test_importing_estimator_loads_no_service_framework() -> None:
    # scipy (allowed, for distribution functions) loads numpy.testing, whose importlib.metadata loads
    # email.utils, which imports socket: what numpy and scipy.special load by themselves is the baseline,
    # and estimator may add none of the names below to it. The frameworks must not be loaded at all.
    code = (
        "import sys, json\n"
        "import numpy, scipy.special\n"
        "baseline = set(sys.modules)\n"
        "import estimator\n"
        "names = ['fastapi', 'paho', 'pydantic', 'service', 'uvicorn', 'socket', 'sqlite3']\n"
        "frameworks = ['fastapi', 'paho', 'pydantic', 'service', 'uvicorn']\n"
        "print(json.dumps(sorted({n for n in names if n in sys.modules and n not in baseline}\n"
        "                        | {n for n in frameworks if n in sys.modules})))\n"
    )
    # A fresh interpreter, so modules imported by other tests do not count.
    done = subprocess.run([sys.executable, "-c", code], cwd=PACKAGE.parent, capture_output=True, text=True,
                          check=True, timeout=60)
    assert json.loads(done.stdout) == []
