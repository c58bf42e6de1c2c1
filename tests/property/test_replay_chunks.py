"""``rwls replay`` and ``rwls fit`` in columnar chunks give the exact path's result, whatever the chunk size.

The exact path applies one sample at a time (:meth:`ChannelBank.apply_one`) and takes the alarms after
each; the columnar path applies chunks of samples in lockstep rounds and takes the alarms after each
chunk. The history below has what could tell them apart: alarms (a gain change after commissioning),
bad rows and refusals (also on chunk boundaries, as the chunk size runs over small values), an ARX
channel with its lag warm-up, a channel weighted by the file's sigma, tracked weights.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.config.settings import RwlsConfig, parse_config
from service.offline.replay import fit_file, replay_file, sweep_file

T0 = 1_780_000_000.0        # seconds, UTC: the first row's time

TRACKED = {"terms": ["1", "u"], "forgetting_factor": 0.95, "weighting": "tracked",
           "detectors": {"commissioning_samples": 60, "calibration_samples": 0, "drift": {"every": 5}}}
ALIKE = [f"a{k}" for k in range(9)]      # channels alike: more than PathTuning.vector_min, so rounds run
CONFIG = {"channels": {
    **{cid: TRACKED for cid in ALIKE},
    "b": {"terms": ["1", "y[-1]", "u"], "forgetting_factor": 0.99,
          "detectors": {"commissioning_samples": 80, "calibration_samples": 0}},
    "c": {"terms": ["1", "u"], "weighting": "sample", "forgetting_factor": 0.98,
          "detectors": {"commissioning_samples": 50, "calibration_samples": 0}},
}}


def _history(path: Path) -> None:
    """Channels interleaved, one row a second each; the gain of a0, a1 and a2 steps up at row 250."""
    rng = np.random.default_rng(11)
    lines = ["t,channel,y,u,sigma"]
    for k in range(400):
        t = T0 + k
        for j, cid in enumerate(ALIKE):
            u = float(rng.uniform(-1.0, 1.0))
            gain = 0.8 if k >= 250 and j < 3 else 0.5
            lines.append(f"{t},{cid},{1.0 + gain * u + 0.02 * float(rng.standard_normal())!r},{u!r},")
        u = rng.uniform(-1.0, 1.0, 2).tolist()
        e = (0.02 * rng.standard_normal(2)).tolist()
        lines.append(f"{t},b,{2.0 + 0.3 * u[0] + e[0]!r},{u[0]!r},")
        lines.append(f"{t},c,{-1.0 + 0.4 * u[1] + e[1]!r},{u[1]!r},0.02")
        if k % 37 == 5:
            lines.append(f"{t},a4,abc,0.5,")                  # bad_number
        if k % 53 == 7:
            lines.append(f"{t - 5},b,1.0,0.5,")                # not later than the last: refused
        if k % 89 == 8:
            lines.append(f"{t - 3},a5,1.0,0.5,")               # refused in a channel the rounds run
        if k % 41 == 9:
            lines.append(f"{t + 0.5},c,1.0,nan,0.02")           # non-finite input: refused
        if k % 61 == 3:
            lines.append(f"{t + 0.5},c,1.0,0.5,")               # no sigma: refused
        if k % 71 == 1:
            lines.append(f"{t + 0.5},z,1.0,0.5,")               # unknown channel
    path.write_text("\n".join(lines) + "\n")


@pytest.fixture(scope="module")
def history(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, RwlsConfig, str, str]:
    path = tmp_path_factory.mktemp("chunks") / "history.csv"
    _history(path)
    config = parse_config(CONFIG)
    replayed = json.dumps(replay_file(path, config, show_progress=False, exact=True).to_json(), sort_keys=True)
    fitted = json.dumps(fit_file(path, config, show_progress=False, exact=True).to_json(), sort_keys=True)
    return path, config, replayed, fitted


def test_the_history_has_alarms_refusals_and_bad_rows(history: tuple[Path, RwlsConfig, str, str]) -> None:
    # What the comparisons below would miss if the history had none of it.
    document = json.loads(history[2])
    assert document["bad_rows"] > 0
    assert set(document["problems_by_reason"]) == {"bad_number", "unknown_channel", "non_finite", "missing_weight",
                                                   "out_of_order"}
    assert all(any(item["action"] == "condition_on" for item in document["channels"][cid]["alarms"])
               for cid in ("a0", "a1", "a2"))


def test_the_chunks_run_in_vectorised_rounds(history: tuple[Path, RwlsConfig, str, str],
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    # What the comparisons above hold to the exact path must include the lockstep rounds, not only the
    # exact path apply_columns falls back to for small work.
    from estimator.channels import column_rounds

    rounds: list[int] = []
    original = column_rounds._run_rounds

    def counted(group: object, prep: object, runnable: np.ndarray) -> np.ndarray:
        rounds.append(int(runnable.shape[0]))
        return original(group, prep, runnable)   # type: ignore[arg-type]

    monkeypatch.setattr(column_rounds, "_run_rounds", counted)
    replay_file(history[0], history[1], show_progress=False, chunk_samples=1000)
    # a5's chunks hold a refusal, so a5 takes the exact path there: the rounds run the other eight.
    assert rounds and max(rounds) == len(ALIKE) - 1


@settings(max_examples=12, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(chunk=st.integers(min_value=1, max_value=900))
def test_replay_in_chunks_of_any_size_equals_the_exact_path(history: tuple[Path, RwlsConfig, str, str],
                                                            chunk: int) -> None:
    path, config, replayed, _ = history
    result = replay_file(path, config, show_progress=False, chunk_samples=chunk)
    assert json.dumps(result.to_json(), sort_keys=True) == replayed


@settings(max_examples=6, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(chunk=st.integers(min_value=1, max_value=900))
def test_fit_in_chunks_of_any_size_equals_the_exact_path(history: tuple[Path, RwlsConfig, str, str],
                                                         chunk: int) -> None:
    path, config, _, fitted = history
    result = fit_file(path, config, show_progress=False, chunk_samples=chunk)
    assert json.dumps(result.to_json(), sort_keys=True) == fitted


def _setting(config: RwlsConfig, forgetting_factor: float, offset_h: float) -> RwlsConfig:
    channels = {}
    for cid, ch in config.channels.items():
        offset = ch.detectors.offset.model_copy(update={"h": offset_h})
        channels[cid] = ch.model_copy(update={"forgetting_factor": forgetting_factor,
                                              "detectors": ch.detectors.model_copy(update={"offset": offset})})
    return config.model_copy(update={"channels": channels})


@pytest.mark.parametrize("chunk", [7, 65_536])
def test_a_sweep_gives_each_setting_what_its_own_replay_gives(history: tuple[Path, RwlsConfig, str, str],
                                                              chunk: int) -> None:
    path, config, _, _ = history
    configs = [_setting(config, lam, h) for lam, h in ((0.95, 3.0), (0.99, 3.0), (0.99, 12.0))]
    swept = [json.dumps(r.to_json(), sort_keys=True)
             for r in sweep_file(path, configs, show_progress=False, chunk_samples=chunk)]
    alone = [json.dumps(replay_file(path, c, show_progress=False, exact=True).to_json(), sort_keys=True)
             for c in configs]
    assert swept == alone
    assert len(set(alone)) == 3                    # the settings do differ: the comparison is not of one run


def test_a_sweep_of_untimed_samples_takes_the_exact_path_and_still_matches(tmp_path: Path) -> None:
    path = tmp_path / "untimed.csv"
    rng = np.random.default_rng(5)
    u = rng.uniform(-1.0, 1.0, 300).tolist()
    path.write_text("y,u\n" + "".join(f"{1.0 + 0.5 * x + 0.01 * k % 0.03!r},{x!r}\n" for k, x in enumerate(u)))
    config = parse_config({"channels": {"a": {"terms": ["1", "u"]}}})
    configs = [_setting(config, lam, 5.0) for lam in (0.9, 0.99)]
    swept = [r.to_json() for r in sweep_file(path, configs, show_progress=False)]
    assert swept == [replay_file(path, c, show_progress=False).to_json() for c in configs]
    assert swept[0] != swept[1]
