"""The arrows between the parts of ``service/`` run one way, as DEVELOPERS.md draws them.

Each subpackage (and each top-level module) of ``service`` has a floor; a module may import only from its own
package or from packages on lower floors. An import that points up (or sideways, to a package on the same floor)
fails this test with the file, the line and the two packages named. Imports are read from the source text (also
those under ``if TYPE_CHECKING:`` and inside functions), so a cycle cannot hide behind a deferred import.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

SERVICE = Path(__file__).resolve().parents[2] / "service"

# Lowest first. The same order, drawn, is in DEVELOPERS.md ("The parts and their arrows").
FLOORS: dict[str, int] = {
    "advisory": 0,       # one sentence, shown everywhere
    "config": 1,         # settings, validated by key
    "broker_link": 2,    # MQTT client, payload decoding, what it hands over
    "alarms": 3,         # lifecycle, feed, notifications, what-if
    "tags": 3,           # plant tags: topics to tags, tag payloads, samples assembled from tag updates
    "engine": 4,         # the single writer, operations, snapshots
    "storage": 5,        # input log, store, checkpoints and recovery
    "fleet": 5,          # replicas and who owns a channel
    "offline": 6,        # replay, fit, reports
    "runtime": 7,        # one running service: wires the parts together
    "api": 8,            # the HTTP face
    "demo": 9,           # the demo plant and `rwls demo`
    "cli": 10,           # the `rwls` command
}


def _package_of(path: Path) -> str:
    parts = path.relative_to(SERVICE).parts
    return parts[0] if len(parts) > 1 else path.stem


def _service_imports(path: Path) -> list[tuple[int, str]]:
    """(line, first name after ``service.``) of every import of ``service.<name>...`` in the file."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        names: list[str] = []
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module == "service":
                names = [alias.name for alias in node.names]
            elif node.module.startswith("service."):
                names = [node.module.split(".")[1]]
        elif isinstance(node, ast.Import):
            names = [alias.name.split(".")[1] for alias in node.names if alias.name.startswith("service.")]
        found += [(node.lineno, name) for name in names]
    return found


def _modules() -> list[Path]:
    return sorted(p for p in SERVICE.rglob("*.py") if p.name != "__init__.py" or p.parent != SERVICE)


def test_every_part_of_service_has_a_floor() -> None:
    parts = {_package_of(p) for p in _modules()}
    assert parts == set(FLOORS), f"give these a floor (and a place in DEVELOPERS.md): {parts ^ set(FLOORS)}"


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(SERVICE)))
def test_imports_point_down_only(path: Path) -> None:
    mine = _package_of(path)
    upward = [f"{path.relative_to(SERVICE.parent)}:{line} ({mine}, floor {FLOORS[mine]}) imports service.{other} "
              f"(floor {FLOORS.get(other, '?')})"
              for line, other in _service_imports(path)
              if other != mine and FLOORS.get(other, 99) >= FLOORS[mine]]
    assert not upward, "arrows that run up or sideways:\n" + "\n".join(upward)


def test_the_floors_are_drawn_in_the_contributor_guide() -> None:
    guide = (SERVICE.parent / "DEVELOPERS.md").read_text(encoding="utf-8")
    for part in FLOORS:
        assert f"`{part}`" in guide, f"DEVELOPERS.md does not name service part `{part}`"


def test_a_backward_arrow_would_be_caught(tmp_path: Path) -> None:
    # The check itself can fail: an engine module importing the API is an arrow pointing up.
    probe = tmp_path / "probe.py"
    probe.write_text("from service.api.app import create_app\n")
    assert _service_imports(probe) == [(1, "api")]
    assert FLOORS["api"] >= FLOORS["engine"]


def _estimator_imports(path: Path) -> list[tuple[int, str]]:
    """(line, module) of every import of ``estimator`` or one of its modules in the file."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0 \
                and (node.module == "estimator" or node.module.startswith("estimator.")):
            found.append((node.lineno, node.module))
        elif isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names if a.name.split(".")[0] == "estimator"]
    return found


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(SERVICE)))
def test_service_uses_the_estimator_through_its_front_door_only(path: Path) -> None:
    side_doors = [f"{path.relative_to(SERVICE.parent)}:{line} imports {module}"
                  for line, module in _estimator_imports(path) if module != "estimator"]
    assert not side_doors, ("import these from `estimator` (add them to estimator/__init__.py's exports):\n"
                            + "\n".join(side_doors))


def test_everything_the_front_door_lists_is_there() -> None:
    import estimator

    missing = [name for name in estimator.__all__ if not hasattr(estimator, name)]
    assert not missing


def test_a_side_door_would_be_caught(tmp_path: Path) -> None:
    probe = tmp_path / "probe.py"
    probe.write_text("from estimator.detection.detectors import KINDS\nimport estimator.recursive.rwls\n"
                     "from estimator import Sample\n")
    assert _estimator_imports(probe) == [(1, "estimator.detection.detectors"), (2, "estimator.recursive.rwls"),
                                         (3, "estimator")]


ESTIMATOR = SERVICE.parent / "estimator"

# The estimator's parts, lowest first (DEVELOPERS.md draws them too).
ESTIMATOR_FLOORS: dict[str, int] = {
    "recursive": 0,      # recursive and batch WLS, statistics of a fit
    "noise": 1,          # noise-variance tracker, operating-point model
    "detection": 2,      # detectors, noise-shape calibration, run lengths, baselines, quantiles
    "channels": 3,       # settings and rules per channel, regressors, groups, rounds, whole state
}


def _estimator_modules() -> list[Path]:
    return sorted(p for p in ESTIMATOR.rglob("*.py") if p.parent != ESTIMATOR)


def test_every_module_of_the_estimator_lives_in_a_part() -> None:
    loose = [p.name for p in ESTIMATOR.glob("*.py") if p.name != "__init__.py"]
    assert not loose, f"put these in one of {sorted(ESTIMATOR_FLOORS)}: {loose}"
    assert {p.relative_to(ESTIMATOR).parts[0] for p in _estimator_modules()} == set(ESTIMATOR_FLOORS)


@pytest.mark.parametrize("path", _estimator_modules(), ids=lambda p: str(p.relative_to(ESTIMATOR)))
def test_estimator_imports_point_down_only(path: Path) -> None:
    mine = path.relative_to(ESTIMATOR).parts[0]
    upward = []
    for line, module in _estimator_imports(path):
        parts = module.split(".")
        if len(parts) == 1:
            upward.append(f"{path.relative_to(ESTIMATOR.parent)}:{line} imports the front door from inside")
            continue
        other = parts[1]
        if other != mine and ESTIMATOR_FLOORS.get(other, 99) >= ESTIMATOR_FLOORS[mine]:
            upward.append(f"{path.relative_to(ESTIMATOR.parent)}:{line} ({mine}) imports {module}")
    assert not upward, "arrows that run up or sideways:\n" + "\n".join(upward)
