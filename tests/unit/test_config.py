"""Configuration: validated model, every error names its key."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.config import ConfigError, load_config, parse_config


def _problems(data: dict) -> list[str]:
    with pytest.raises(ConfigError) as info:
        parse_config(data)
    return info.value.problems


def test_minimal_channel_gets_documented_defaults() -> None:
    config = parse_config({"channels": {"a": {"terms": ["1", "u"]}}})
    channel = config.channels["a"]
    assert channel.forgetting_factor == 1.0
    assert channel.weighting == "unit"
    assert channel.covariance_limit == 1e6
    assert channel.noise.half_life == 200.0
    settings = channel.settings()
    assert settings.terms == ("1", "u")
    assert settings.input_names == ("u",)


def test_forgetting_factor_out_of_range_names_the_key() -> None:
    problems = _problems({"channels": {"flow": {"terms": ["1"], "forgetting_factor": 1.2}}})
    assert problems == ["channels.flow.forgetting_factor: must be in (0, 1], got 1.2"]


def test_bad_term_names_the_key_and_the_term() -> None:
    (problem,) = _problems({"channels": {"flow": {"terms": ["1", "2u"]}}})
    assert problem.startswith("channels.flow.terms: term '2u': cannot read factor '2u'")


def test_unknown_key_and_missing_terms_are_both_reported() -> None:
    problems = _problems({"channels": {"flow": {"term": ["1"]}}})
    assert "channels.flow.terms: required key missing" in problems
    assert "channels.flow.term: unknown key" in problems


def test_weighting_must_be_one_of_three() -> None:
    (problem,) = _problems({"channels": {"x": {"terms": ["1"], "weighting": "magic"}}})
    assert problem.startswith("channels.x.weighting:")


def test_weight_rule_band_must_be_ordered() -> None:
    rule = {"input": "u", "low": 5.0, "high": 1.0, "factor": 2.0}
    (problem,) = _problems({"channels": {"x": {"terms": ["1", "u"], "weight_rules": [rule]}}})
    assert problem.startswith("channels.x.weight_rules.0:") and "low <= high" in problem


def test_channel_ids_are_restricted() -> None:
    (problem,) = _problems({"channels": {"bad id!": {"terms": ["1"]}}})
    assert "channel id 'bad id!'" in problem


def test_no_channels_is_an_error() -> None:
    assert _problems({"channels": {}})[0].startswith("channels:")


def test_toml_syntax_error_and_missing_file_are_config_errors(tmp_path: Path) -> None:
    broken = tmp_path / "broken.toml"
    broken.write_text("[channels.a\nterms = [")
    with pytest.raises(ConfigError, match="TOML syntax error"):
        load_config(broken)
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "absent.toml")


def test_noise_half_life_in_seconds_switches_the_tracker_to_time(tmp_path: Path) -> None:
    path = tmp_path / "c.toml"
    path.write_text('[channels.a]\nterms = ["1"]\nnoise = { half_life_seconds = 3600 }\n')
    settings = load_config(path).channels["a"].settings()
    assert settings.noise_half_life == 3600.0
    assert settings.noise_half_life_in_seconds is True
