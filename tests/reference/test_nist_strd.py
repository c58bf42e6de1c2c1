"""NIST StRD linear regression through `rwls replay` (recursive) and `rwls fit` (batch).

# NIST Statistical Reference Datasets (StRD), linear regression: public-domain
# data and certified values, https://www.itl.nist.gov/div898/strd/, kept in
# tests/reference/data/nist_strd/ (estimates, their standard deviations,
# residual standard deviation; each file names its source). Agreement as the
# log relative error, LRE (McCullough 1998). Thresholds: the project's
# foundation issue; the replay ones sit below what a backward-stable float64 QR
# reaches on each file, the plain covariance-form RLS reaches 0-4 digits on
# most of them.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from service.cli import main
from tests.reference.strd import dataset_names, log_relative_error, read_case

# Minimum LRE of the parameter estimates, per path.
REPLAY_MIN_LRE = {"Norris": 12, "Pontius": 11, "NoInt1": 13, "NoInt2": 13, "Longley": 9, "Wampler1": 9,
                  "Wampler2": 10, "Wampler3": 8, "Wampler4": 7, "Wampler5": 5, "Filip": 4}
FIT_MIN_LRE = {"Norris": 12, "Pontius": 13, "NoInt1": 14, "NoInt2": 14, "Longley": 10, "Filip": 7,
               "Wampler1": 9, "Wampler2": 12, "Wampler3": 8.5, "Wampler4": 7.5, "Wampler5": 5.5}
# Standard errors and residual SD: at least 6 digits on these, both paths.
UNCERTAINTY_SETS = ("Norris", "Pontius", "NoInt1", "NoInt2", "Longley")


def test_every_dataset_in_the_repository_is_checked_and_none_is_missing() -> None:
    # The data live in the repository, so a missing or extra file is a failure, never a skip.
    assert dataset_names() == sorted(REPLAY_MIN_LRE) == sorted(FIT_MIN_LRE)


def _write_case(tmp_path: Path, name: str) -> tuple[Path, Path]:
    case = read_case(name)
    data = tmp_path / f"{name}.csv"
    # The printed tokens go into the CSV unchanged, so no digit is lost on the way.
    data.write_text(",".join(case.columns) + "\n" + "\n".join(",".join(r) for r in case.rows) + "\n")
    config = tmp_path / f"{name}.toml"
    terms = ", ".join(f'"{t}"' for t in case.terms)
    config.write_text(f'[channels.nist]\nterms = [{terms}]\nforgetting_factor = 1.0\nweighting = "unit"\n')
    return data, config


def _run(command: str, name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> dict:
    data, config = _write_case(tmp_path, name)
    assert main([command, str(data), "--config", str(config), "--json", "--no-progress"]) == 0
    return json.loads(capsys.readouterr().out)["channels"]["nist"]


@pytest.mark.parametrize("command, thresholds", [("replay", REPLAY_MIN_LRE), ("fit", FIT_MIN_LRE)])
@pytest.mark.parametrize("name", sorted(REPLAY_MIN_LRE))
def test_certified_estimates_reach_required_digits(command: str, thresholds: dict, name: str,
                                                   tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    case = read_case(name)
    result = _run(command, name, tmp_path, capsys)
    estimates = [result["parameters"][t] for t in result["terms"]]
    lre = log_relative_error(estimates, case.beta)
    print(f"{command} {name}: min LRE of estimates {lre:.2f}")
    assert result["samples"] == len(case.rows)
    assert lre >= thresholds[name], f"{command} {name}: LRE {lre:.2f} < {thresholds[name]}"


@pytest.mark.parametrize("command", ["replay", "fit"])
@pytest.mark.parametrize("name", UNCERTAINTY_SETS)
def test_certified_standard_errors_and_residual_sd_reach_six_digits(
        command: str, name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    case = read_case(name)
    result = _run(command, name, tmp_path, capsys)
    std_errors = [result["std_errors"][t] for t in result["terms"]]
    assert log_relative_error(std_errors, case.beta_sd) >= 6
    assert log_relative_error(result["residual_sd"], case.residual_sd) >= 6


def test_rwls_console_script_replays_norris(tmp_path: Path) -> None:
    """The installed `rwls` command, as a user would run it."""
    data, config = _write_case(tmp_path, "Norris")
    script = Path(sys.executable).with_name("rwls")
    done = subprocess.run([str(script), "replay", str(data), "--config", str(config), "--json"],
                          capture_output=True, text=True, timeout=120, check=True)
    result = json.loads(done.stdout)["channels"]["nist"]
    assert log_relative_error([result["parameters"][t] for t in result["terms"]],
                              read_case("Norris").beta) >= 12  # NIST StRD, Norris, certified values
