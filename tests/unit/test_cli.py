"""The `rwls` command: replay, fit, check-config, exit codes, JSON, refused rows."""

from __future__ import annotations

import argparse
import io
import json
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from service.cli import build_parser, main
from service.demo.plant import larkspur_substation7
from service.offline.progress import Progress

REPO = Path(__file__).resolve().parents[2]
DEMO_CSV = REPO / "examples" / "larkspur_sub7.csv"
DEMO_TOML = REPO / "examples" / "larkspur_sub7.toml"


def _json(capsys: pytest.CaptureFixture[str], *argv: str) -> dict:
    assert main([*argv, "--json", "--no-progress"]) == 0
    return json.loads(capsys.readouterr().out)


def _write(tmp_path: Path, csv_text: str, toml_text: str) -> tuple[str, str]:
    data, config = tmp_path / "d.csv", tmp_path / "c.toml"
    data.write_text(csv_text)
    config.write_text(toml_text)
    return str(data), str(config)


def test_demo_replay_reports_every_channel(capsys: pytest.CaptureFixture[str]) -> None:
    result = _json(capsys, "replay", str(DEMO_CSV), "--config", str(DEMO_TOML))
    channels = result["channels"]
    assert sorted(channels) == ["sub7.flow", "sub7.level", "sub7.return_dp", "sub7.return_temp", "sub7.stack_o2",
                                "sub7.supply_temp"]
    # A month of scans (4320 at 10 min): a sample at each for the channels whose tags publish at every scan,
    # fewer for the return thermocouple (its probe's weekly checks) and the level (published by exception).
    formed = Counter(s.channel for s in larkspur_substation7(np.random.default_rng(7), samples=4320))
    assert {cid: report["samples"] + report["warmup"] for cid, report in channels.items()} == formed
    assert channels["sub7.flow"]["samples"] == 4320
    assert (channels["sub7.stack_o2"]["samples"], channels["sub7.stack_o2"]["warmup"]) == (4319, 1)
    assert formed["sub7.return_temp"] < 4320 and formed["sub7.level"] < 4320
    assert result["rows"] == sum(formed.values()) and result["bad_rows"] == 0
    for report in channels.values():
        assert set(report) >= {"terms", "parameters", "std_errors", "covariance", "residual_sd",
                               "noise_sigma", "samples", "rejected"}
        cov = np.array(report["covariance"])
        assert cov.shape == (len(report["terms"]),) * 2
        assert np.allclose(cov, cov.T, rtol=0.0, atol=0.0)   # symmetrised before it is reported
        assert np.all(np.linalg.eigvalsh(cov) > 0.0)


def test_fit_equals_replay_on_the_demo_history(capsys: pytest.CaptureFixture[str]) -> None:
    replay = _json(capsys, "replay", str(DEMO_CSV), "--config", str(DEMO_TOML))["channels"]
    fit = _json(capsys, "fit", str(DEMO_CSV), "--config", str(DEMO_TOML))["channels"]
    for cid, report in replay.items():
        r = np.array([report["parameters"][t] for t in report["terms"]])
        f = np.array([fit[cid]["parameters"][t] for t in report["terms"]])
        # Same samples, same weights; the anti-windup bound never engages on this
        # richly excited history, so only rounding separates the two. The tolerance
        # is relative to the parameter vector's size (an intercept near 0 would make
        # an entrywise relative test meaningless).
        assert np.max(np.abs(r - f)) <= 1e-10 * np.max(np.abs(f)), cid
        se_r = np.array([report["std_errors"][t] for t in report["terms"]])
        se_f = np.array([fit[cid]["std_errors"][t] for t in report["terms"]])
        np.testing.assert_allclose(se_r, se_f, rtol=1e-8)


def test_bad_rows_are_counted_listed_and_never_stop_the_run(tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    rows = ["t,y,u", "1,1.0,0.5", "2,oops,0.5", "3,2.0,", "3,2.1,0.7", "2.5,2.2,0.1", "4,nan,1",
            "5,2.5,1.5", "6,1"]
    rows += [f"{7 + k},{1.0 + 0.3 * k},{0.2 * k}" for k in range(10)]
    data, config = _write(tmp_path, "\n".join(rows) + "\n", '[channels.c]\nterms = ["1", "u"]\n')
    result = _json(capsys, "replay", data, "--config", config)
    channel = result["channels"]["c"]
    problems = [(p["line"], p["reason"]) for p in result["problems"]]
    assert problems == [(3, "bad_number"), (4, "missing_input"), (6, "out_of_order"), (7, "non_finite"),
                        (9, "bad_row")]
    assert result["bad_rows"] == 2
    assert channel["rejected"] == 3
    assert channel["rejections"] == {"missing_input": 1, "non_finite": 1, "out_of_order": 1}
    assert channel["samples"] == 13


def test_rows_of_unknown_channels_are_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = "channel,y,u\na,1,1\nb,2,2\nzzz,3,3\na,2,2\n"
    config = '[channels.a]\nterms = ["1", "u"]\n[channels.b]\nterms = ["u"]\n'
    data, conf = _write(tmp_path, text, config)
    result = _json(capsys, "replay", data, "--config", conf)
    assert result["problems"] == [{"line": 4, "reason": "unknown_channel", "channel": "zzz"}]
    assert result["channels"]["a"]["samples"] == 2 and result["channels"]["b"]["samples"] == 1


def test_json_never_contains_nan(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # One sample for two parameters: nothing is identifiable yet, so the report is all nulls.
    data, config = _write(tmp_path, "y,u\n1,2\n", '[channels.c]\nterms = ["1", "u"]\n')
    assert main(["replay", data, "--config", config, "--json"]) == 0
    text = capsys.readouterr().out
    assert "NaN" not in text and "Infinity" not in text
    report = json.loads(text)["channels"]["c"]
    assert report["parameters"] == {"1": None, "u": None}


def test_several_channels_need_a_channel_column(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    config = '[channels.a]\nterms = ["1"]\n[channels.b]\nterms = ["1"]\n'
    data, conf = _write(tmp_path, "y\n1\n", config)
    assert main(["replay", data, "--config", conf]) == 1
    assert "lacks column(s): channel" in capsys.readouterr().err


def test_missing_data_file_is_exit_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _, config = _write(tmp_path, "", '[channels.a]\nterms = ["1"]\n')
    assert main(["fit", str(tmp_path / "absent.csv"), "--config", config]) == 1
    assert "data error" in capsys.readouterr().err


def test_bad_config_is_exit_2_and_names_the_key(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data, config = _write(tmp_path, "y\n1\n", '[channels.a]\nterms = ["1"]\nforgetting_factor = 0\n')
    assert main(["replay", data, "--config", config]) == 2
    assert "channels.a.forgetting_factor: must be in (0, 1], got 0" in capsys.readouterr().err
    assert main(["check-config", config]) == 2


def test_check_config_accepts_the_demo_configuration(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check-config", str(DEMO_TOML)]) == 0
    assert "ok, 6 channel(s)" in capsys.readouterr().out


def test_forgetting_factor_override_applies_to_every_channel(capsys: pytest.CaptureFixture[str]) -> None:
    result = _json(capsys, "replay", str(DEMO_CSV), "--config", str(DEMO_TOML), "--forgetting-factor", "0.99")
    assert {r["forgetting_factor"] for r in result["channels"].values()} == {0.99}
    # sum of lambda^m over 4320 samples = (1 - 0.99^4320) / 0.01 = 100 to 1e-17 relative.
    for report in result["channels"].values():
        assert report["effective_count"] == pytest.approx(100.0, rel=1e-9)
    assert main(["replay", str(DEMO_CSV), "--config", str(DEMO_TOML), "--forgetting-factor", "1.5"]) == 2


def test_text_output_shows_tables_and_refused_rows(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data, config = _write(tmp_path, "y,u\n1,1\n2,x\n3,2\n4,3\n", '[channels.c]\nterms = ["1", "u"]\n')
    assert main(["replay", data, "--config", config]) == 0
    out = capsys.readouterr().out
    assert "channel c  (replay; weighting unit" in out
    assert "line 3: bad_number" in out
    assert "95% interval" in out


def test_fit_reports_a_not_identifiable_channel(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    data, config = _write(tmp_path, "y,u\n1,2\n2,2\n3,2\n", '[channels.c]\nterms = ["1", "u"]\n')
    report = _json(capsys, "fit", data, "--config", config)["channels"]["c"]
    assert report["error"].startswith("not identifiable")
    assert report["parameters"] == {"1": None, "u": None}


def test_several_forgetting_factors_replay_side_by_side_in_one_run(capsys: pytest.CaptureFixture[str]) -> None:
    sweep = _json(capsys, "replay", str(DEMO_CSV), "--config", str(DEMO_TOML), "--forgetting-factor", "0.99,0.995",
                  "--offset-h", "6")["sweep"]
    assert [run["setting"] for run in sweep] == [{"forgetting_factor": 0.99, "offset_h": 6.0},
                                                {"forgetting_factor": 0.995, "offset_h": 6.0}]
    assert [{r["forgetting_factor"] for r in run["channels"].values()} for run in sweep] == [{0.99}, {0.995}]
    assert main(["replay", str(DEMO_CSV), "--config", str(DEMO_TOML), "--no-progress",
                 "--forgetting-factor", "0.99,0.995"]) == 0
    text = capsys.readouterr().out
    assert text.startswith("sweep: 2 settings in one pass") and "lambda=0.99" in text and "lambda=0.995" in text


def test_a_sweep_refuses_the_report_and_bad_lists(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["replay", str(DEMO_CSV), "--config", str(DEMO_TOML), "--forgetting-factor", "0.99,0.995",
                 "--report", str(tmp_path / "r.html")]) == 2
    assert "--report: one setting at a time" in capsys.readouterr().err
    assert not (tmp_path / "r.html").exists()
    with pytest.raises(SystemExit):
        main(["replay", str(DEMO_CSV), "--config", str(DEMO_TOML), "--forgetting-factor", "0.99,x"])
    assert "expected a number or numbers separated by commas" in capsys.readouterr().err
    assert main(["replay", str(DEMO_CSV), "--config", str(DEMO_TOML), "--forgetting-factor", "0.99,1.5"]) == 2


def test_progress_bar_draws_only_when_enabled() -> None:
    shown, hidden = io.StringIO(), io.StringIO()
    for stream, enabled in ((shown, True), (hidden, None)):
        bar = Progress(100, "replay", stream=stream, enabled=enabled, interval=0.0)
        bar.update(50, 1000)
        bar.close()
    assert "50.0%" in shown.getvalue() and "1,000 rows" in shown.getvalue()
    assert hidden.getvalue() == ""     # StringIO is not a terminal


def test_progress_bar_shows_rows_per_second_and_the_time_left(monkeypatch: pytest.MonkeyPatch) -> None:
    import service.offline.progress as progress_module

    clock = iter([100.0, 110.0])                 # seconds: at the start, then at the update
    monkeypatch.setattr(progress_module.time, "monotonic", lambda: next(clock))
    stream = io.StringIO()
    bar = Progress(4_000, "replay", stream=stream, enabled=True, interval=0.0)
    bar.update(1_000, 10_000)                     # a quarter of the file in 10 s: 30 s to go at this pace
    assert "25.0%" in stream.getvalue() and "1,000 rows/s" in stream.getvalue()
    assert "0:30 left" in stream.getvalue()


def test_demo_channels_are_those_of_the_bundled_example(tmp_path: Path) -> None:
    # One plant: `rwls demo` (its own copy of the files) and `examples/larkspur_sub7.toml` must not drift apart.
    from service.config.settings import load_config
    from service.demo.run import demo_config

    example = load_config(Path(__file__).resolve().parents[2] / "examples" / "larkspur_sub7.toml")
    built_in = demo_config("mqtt://127.0.0.1:1883", str(tmp_path))
    assert built_in.channel_settings() == example.channel_settings()
    assert built_in.channel_tags() == example.channel_tags()
    assert (built_in.tags.formats, built_in.tags.tag) == (example.tags.formats, example.tags.tag)
    assert [Path(name).read_bytes() for name in built_in.tags.files] == [
        Path(name).read_bytes() for name in example.tags.files]


def test_serve_on_a_taken_port_says_so_in_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import socket

    config = tmp_path / "plant.toml"
    config.write_text(f'[store]\npath = "{tmp_path / "store"}"\n[channels.a]\ntopic = "t/a"\nterms = ["1"]\n')
    holder = socket.socket()
    holder.bind(("127.0.0.1", 0))
    holder.listen()
    port = holder.getsockname()[1]
    try:
        assert main(["serve", "-c", str(config), "--port", str(port)]) == 2
    finally:
        holder.close()
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert err[0].startswith(f"rwls serve: port {port} on 127.0.0.1 is already in use")
    assert "--port 0" in err[0] and "http.port" in err[0]


def _subcommands() -> dict[str, argparse.ArgumentParser]:
    actions = [a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction)]
    return dict(actions[0].choices)


@pytest.mark.parametrize("command", ["serve", "demo", "token", "simulate", "replay", "fit", "check-config"])
def test_every_command_describes_itself_and_each_option(command: str) -> None:
    parser = _subcommands()[command]
    assert parser.description and len(parser.description.split()) >= 5, f"{command} has no description"
    for action in parser._actions:
        if not isinstance(action, argparse._HelpAction):
            assert action.help and action.help.strip(), f"{command} {action.option_strings or action.dest} has no help"


def test_the_subcommands_tested_are_all_there_are() -> None:
    assert set(_subcommands()) == {"serve", "demo", "token", "simulate", "replay", "fit", "check-config"}


def test_demo_help_names_the_data_directory_default_and_where_it_lives(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["demo", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "relative to the working directory" in text and "(default: rwls-demo-data)" in text
    assert "(default: 7)" not in text            # demo has no seed; simulate has


def test_simulate_help_documents_both_payload_shapes(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["simulate", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "--payload {tags,samples}" in text and "(default: tags)" in text
    assert "one topic per instrument tag, <prefix>/sub7/<TAG>" in text
    assert '{"v": value, "ts": epoch milliseconds, "q": quality}' in text
    assert "by exception" in text
    assert '<prefix>/sub7/<channel>, each message {"t", "y", "u", "seq"}' in text
    assert "messages per second" in text


def test_problem_counts_by_reason_are_totals_and_only_the_listing_is_capped(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from service.offline.replay import MAX_LISTED_ROWS

    bad = MAX_LISTED_ROWS + 600
    rows = ["t,y,u"] + [f"{k},oops,1" for k in range(1, bad + 1)] + [f"{bad + k},{k},{k % 5}" for k in range(1, 40)]
    rows += [f"{bad + 40},1,"] * 3          # three more of another reason, after the listing is full
    data, config = _write(tmp_path, "\n".join(rows) + "\n", '[channels.c]\nterms = ["1", "u"]\n')
    result = _json(capsys, "replay", data, "--config", config)
    assert result["problems_by_reason"] == {"bad_number": bad, "missing_input": 3}
    assert len(result["problems"]) == result["problems_listed"] == MAX_LISTED_ROWS
    assert main(["replay", data, "--config", config, "--no-progress"]) == 0
    text = capsys.readouterr().out
    assert f"{bad + 3} problems by reason: bad_number {bad}, missing_input 3" in text
    assert f"--json lists the first {MAX_LISTED_ROWS}; the counts above are of all {bad + 3}" in text


def test_fit_gives_a_batch_noise_sigma_in_units_of_y_and_labels_the_residual_sd(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rng = np.random.default_rng(3)
    u = rng.uniform(0.0, 2.0, 3000)
    sigma = np.where(np.arange(3000) % 2 == 0, 0.1, 0.4)
    y = 1.0 + 2.0 * u + sigma * rng.normal(size=3000)
    rows = ["t,y,u,sigma"] + [f"{k},{float(y[k])!r},{float(u[k])!r},{float(sigma[k])!r}" for k in range(3000)]
    channels = ('[channels.w]\nterms = ["1", "u"]\nweighting = "sample"\nforgetting_factor = 1.0\n')
    data, config = _write(tmp_path, "\n".join(rows) + "\n", channels)
    fit = _json(capsys, "fit", data, "--config", config)["channels"]["w"]
    # One sigma for the whole history: the root mean square of 0.1 and 0.4 alternating, sqrt(0.085).
    assert fit["noise_sigma"] == pytest.approx(np.sqrt(0.085), rel=0.05)
    assert fit["residual_sd_scale"] == "weighted"
    assert fit["residual_sd"] == pytest.approx(1.0, rel=0.05)      # weights 1/sigma^2 match the noise
    assert main(["fit", data, "--config", config]) == 0
    text = capsys.readouterr().out
    assert "weighted residual sd" in text and "(units of y, batch estimate)" in text


def test_check_config_reports_every_bad_term_of_a_list_in_one_pass(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    config = tmp_path / "bad.toml"
    config.write_text('[channels.a]\nterms = ["1", "u^", "v*", "u"]\nnoise = { model_terms = ["1", "load^0"] }\n'
                      '[channels.b]\nterms = ["y[-1"]\n')
    assert main(["check-config", str(config)]) == 2
    err = capsys.readouterr().err
    keys = [line.split(":", 1)[0].strip() for line in err.splitlines()[1:]]
    assert keys == ["channels.a.terms[1]", "channels.a.terms[2]", "channels.a.noise.model_terms[1]",
                    "channels.b.terms[0]"]


def test_check_config_warns_of_a_budget_shared_by_too_few_channels(tmp_path: Path,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    budget = "[alarms]\nbudget = {{ false_alarms = 1, per_seconds = 600, sample_period = 10 }}\n"
    one = tmp_path / "one.toml"
    one.write_text(budget.format() + '[channels.a]\nterms = ["1", "u"]\n')
    assert main(["check-config", str(one)]) == 0
    out, err = capsys.readouterr()
    assert "false-alarm budget:" in out
    assert err.startswith("warning: the budget leaves each detector of each channel 48 false alarms a day")
    many = tmp_path / "many.toml"       # 1,000 channels: 0.048 a day each, no warning
    many.write_text(budget.format() + "".join(f'[channels.c{k}]\nterms = ["1", "u"]\n' for k in range(1000)))
    assert main(["check-config", str(many)]) == 0
    assert capsys.readouterr().err == ""
