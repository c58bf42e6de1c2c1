"""Replay and fit of a long CSV: the service's tag path offline, the engine's state bit for bit, any chunk size."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from service.broker_link.messages import DeadLetter, Message
from service.cli import main
from service.config.settings import RwlsConfig, parse_config
from service.engine.writer import Engine
from service.offline.replay import apply_history, replay_file
from service.tags.tag_path import tag_path_of
from tests.support.service_process import toml_text
from tests.support.state_equality import assert_same_state
from tests.support.tag_streams import TagUpdate, tag_plant, tag_stream, write_long_csv

PREFIX = "plant"


def _config(tmp_path: Path) -> RwlsConfig:
    return parse_config(tag_plant(tmp_path, PREFIX))


def _engine_fed(config: RwlsConfig, updates: list[TagUpdate], max_batch: int) -> tuple[Engine, list[DeadLetter]]:
    """The live engine, fed the stream as tag messages (queued first, so the micro-batches are ``max_batch``)."""
    letters: list[DeadLetter] = []
    engine = Engine(config.channel_settings(), tags=tag_path_of(config), prepare=config.apply_baselines,
                    dead_letter=letters.append, max_batch=max_batch)
    for k, update in enumerate(updates):
        assert engine.submit(Message(None, update.payload(), "mqtt", topic=update.topic, received=1000.0 + k),
                             timeout=1.0)
    engine.start()
    try:
        assert engine.drain(20.0)
    finally:
        engine.stop()
    return engine, letters


@pytest.mark.parametrize("max_batch", [1, 64, 5000])
def test_replay_of_a_long_csv_leaves_the_state_the_engine_leaves_fed_the_same_tag_messages(
        tmp_path: Path, max_batch: int) -> None:
    config = _config(tmp_path)
    updates = tag_stream(PREFIX, seed=21, steps=300)
    data = tmp_path / "history.csv"
    write_long_csv(data, updates)
    engine, letters = _engine_fed(config, updates, max_batch)
    bank, result = apply_history(data, config)

    assert_same_state(bank.state(), engine.bank.state())
    assert letters == [] and result.bad_rows == 0 and result.problems_by_reason == {}
    assert result.layout == "long" and result.rows == len(updates)
    assert result.samples_not_formed == engine.stats.not_formed
    assert result.tag_updates_unused == engine.stats.tag_updates_unused > 0
    assert result.tag_updates_not_newer == engine.stats.tag_updates_not_newer == 1
    # The stream is no trivial one: both channels learnt, and samples failed to form for several reasons.
    views = bank.view()
    assert views["sub7.flow"].applied > 200 and views["sub7.temp"].applied > 200
    assert {"input_missing", "output_bad_quality"} <= result.samples_not_formed["sub7.flow"].keys()
    assert {"input_unmatched", "input_bad_quality", "output_bad_quality"} <= \
        result.samples_not_formed["sub7.temp"].keys()


def test_the_chunk_size_changes_not_a_bit(tmp_path: Path) -> None:
    config = _config(tmp_path)
    data = tmp_path / "history.csv"
    write_long_csv(data, tag_stream(PREFIX, seed=22, steps=200))
    lines = data.read_text().splitlines()
    lines.insert(40, "yesterday,sub7.FT-101,1,good")               # a bad row inside, to order among samples
    data.write_text("\n".join(lines) + "\n")
    runs = {chunk: apply_history(data, config, chunk_rows=chunk) for chunk in (1, 7, 4096)}
    for chunk in (1, 7):
        assert_same_state(runs[chunk][0].state(), runs[4096][0].state())
        assert json.dumps(runs[chunk][1].to_json()) == json.dumps(runs[4096][1].to_json())   # in order too
    reports = {chunk: json.dumps(replay_file(data, config, chunk_rows=chunk).to_json()) for chunk in (1, 4096)}
    assert reports[1] == reports[4096]                              # alarms, problem lists and all


def test_bad_rows_and_unknown_tags_are_listed_by_line_and_leave_the_state_as_the_clean_stream_leaves_it(
        tmp_path: Path) -> None:
    config = _config(tmp_path)
    clean = tmp_path / "clean.csv"
    write_long_csv(clean, tag_stream(PREFIX, seed=23, steps=120))
    lines = clean.read_text().splitlines()
    inserted = {10: "1767225700,sub7.FT-101,abc,good", 20: "1767225700,sub7.XX-999,1,good",
                30: "1767225700,sub7.TT-102,,192", 40: "1767225700,nobody,1,good", 50: "1767225700,,1,good",
                60: "1767225700,sub7.SC-101,1,good,extra"}
    for index in sorted(inserted):              # ascending: each lands on line index + 1 of the new file
        lines.insert(index, inserted[index])
    dirty = tmp_path / "dirty.csv"
    dirty.write_text("\n".join(lines) + "\n")
    bank, result = apply_history(dirty, config)
    assert_same_state(bank.state(), apply_history(clean, config)[0].state())
    # 'sub7.XX-999' fits the gateway pattern's template, so a pattern could name it: a known tag, unused.
    listed = [(p["line"], p["reason"]) for p in result.listed_problems]
    assert listed == [(11, "bad_number"), (31, "missing_value"), (41, "unknown_tag"), (51, "missing_tag"),
                      (61, "bad_row")]
    assert result.bad_rows == 5
    assert result.tag_updates_unused == apply_history(clean, config)[1].tag_updates_unused + 1


def test_a_tag_that_patterns_of_different_quality_rules_can_name_is_an_ambiguous_row(tmp_path: Path) -> None:
    config = parse_config({
        "tags": {"formats": {"gateway": {"kind": "json", "value": "/v", "quality": "/q", "good": ["good"]}},
                 "tag": [{"id": "{1}", "topic": "a/+/x", "format": "gateway"}, {"id": "{1}", "topic": "b/+/y"},
                         {"id": "U", "topic": "plant/U"}]},
        "channels": {"c": {"terms": ["1", "u"], "tags": {"output": "T", "inputs": {"u": "U"}}}}})
    data = tmp_path / "long.csv"
    data.write_text("time,tag,value,quality\n1767225600,U,1,\n1767225601,T,2,bad\n1767225602,U,2,x\n")
    _, result = apply_history(data, config)
    assert [(p["line"], p["reason"]) for p in result.listed_problems] == [(3, "ambiguous_tag")]
    assert result.bad_rows == 1 and result.samples_not_formed == {}


def test_quality_cells_decide_as_the_tags_format_says(tmp_path: Path) -> None:
    config = parse_config({
        "tags": {"formats": {"gateway": {"kind": "json", "value": "/v", "quality": "/q", "good": ["good", 192]}},
                 "tag": [{"id": "Y", "topic": "plant/Y", "format": "gateway"}, {"id": "U", "topic": "plant/U"}]},
        "channels": {"c": {"terms": ["1", "u"], "tags": {"output": "Y", "inputs": {"u": "U"}}}}})
    data = tmp_path / "long.csv"
    # U is a number tag (no quality rule): 'bad' there is still good. Y by its rule: good, 192, empty; not 'bad', 0.
    data.write_text("time,tag,value,quality\n1767225600,U,1,bad\n1767225601,Y,2,good\n1767225602,Y,3,192.0\n"
                    "1767225603,Y,4,\n1767225604,Y,5,bad\n1767225605,Y,6,0\n")
    bank, result = apply_history(data, config)
    assert result.samples_not_formed == {"c": {"output_bad_quality": 2}}
    assert bank.view()["c"].applied == 3


def test_rwls_replay_and_fit_read_a_long_csv_and_report_samples_not_formed(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    conf = tmp_path / "plant.toml"
    conf.write_text(toml_text(tag_plant(tmp_path, PREFIX)))
    data = tmp_path / "history.csv"
    write_long_csv(data, tag_stream(PREFIX, seed=24, steps=150))
    assert main(["replay", str(data), "--config", str(conf), "--json", "--no-progress"]) == 0
    replayed = json.loads(capsys.readouterr().out)
    assert replayed["layout"] == "long" and replayed["bad_rows"] == 0
    expected = apply_history(data, parse_config(tag_plant(tmp_path, PREFIX)))[1]
    assert replayed["samples_not_formed"] == expected.samples_not_formed
    assert main(["fit", str(data), "--config", str(conf), "--json", "--no-progress"]) == 0
    fitted = json.loads(capsys.readouterr().out)
    for cid in ("sub7.flow", "sub7.temp"):
        assert fitted["channels"][cid]["samples"] == replayed["channels"][cid]["samples"] > 100
    assert main(["replay", str(data), "--config", str(conf), "--no-progress"]) == 0
    text = capsys.readouterr().out
    assert "samples not formed from tag updates: " in text and "input_missing 1" in text
    assert "tag updates: " in text and "not later than their tag's newest" in text


def test_the_html_report_of_a_long_csv_names_the_samples_not_formed(tmp_path: Path) -> None:
    conf = tmp_path / "plant.toml"
    conf.write_text(toml_text(tag_plant(tmp_path, PREFIX)))
    data = tmp_path / "history.csv"
    write_long_csv(data, tag_stream(PREFIX, seed=25, steps=80))
    page = tmp_path / "report.html"
    assert main(["replay", str(data), "--config", str(conf), "--report", str(page), "--no-progress"]) == 0
    html = page.read_text()
    expected = apply_history(data, parse_config(tag_plant(tmp_path, PREFIX)))[1].samples_not_formed
    assert expected                                       # the stream has missing and bad inputs
    for cid, counts in expected.items():
        section = html.split(f'<section class="channel" id="channel-{cid}"', 1)[1].split("</section>", 1)[0]
        assert f"{sum(counts.values())} output tag updates formed no sample" in section
        for reason, n in counts.items():
            assert f"{reason} {n}" in section


def test_a_long_csv_needs_channels_assembled_from_tags(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    conf = tmp_path / "plain.toml"
    conf.write_text('[channels.c]\nterms = ["1", "u"]\n')
    data = tmp_path / "long.csv"
    data.write_text("time,tag,value\n1767225600,U,1\n")
    assert main(["replay", str(data), "--config", str(conf)]) == 1
    assert "needs channels assembled from tags" in capsys.readouterr().err
