"""A channel assembled from tags: what its configuration must say, and how the service subscribes for it."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from service.config.settings import ConfigError, load_config, parse_config
from service.runtime import _subscriptions
from service.tags.tag_path import tag_path_of


def _config(channel: dict[str, Any], **extra: Any) -> dict[str, Any]:
    return {"tags": {"tag": [{"id": "FT1", "topic": "p/FT1"}, {"id": "SC1", "topic": "p/SC1"}]},
            "channels": {"flow": {"terms": ["1", "speed"], **channel}}, **extra}


def _problems(data: dict[str, Any]) -> str:
    with pytest.raises(ConfigError) as info:
        parse_config(data)
    return "\n".join(info.value.problems)


def test_a_tag_fed_channel_needs_a_tag_for_every_input_its_terms_use_and_no_other() -> None:
    assert "no tag for input(s) speed" in _problems(_config({"tags": {"output": "FT1"}}))
    extra = _problems(_config({"tags": {"output": "FT1", "inputs": {"speed": "SC1", "load": "SC1"}}}))
    assert "input(s) load not used by any term" in extra


def test_noise_model_terms_count_as_inputs_a_tag_must_stand_behind() -> None:
    channel = {"tags": {"output": "FT1", "inputs": {"speed": "SC1"}},
               "noise": {"model_terms": ["1", "load"]}}
    assert "no tag for input(s) load" in _problems(_config(channel))


def test_topic_and_tags_are_exclusive_and_sample_weighting_is_refused() -> None:
    both = _config({"topic": "p/flow", "tags": {"output": "FT1", "inputs": {"speed": "SC1"}}})
    assert "not both" in _problems(both)
    sampled = _config({"weighting": "sample", "tags": {"output": "FT1", "inputs": {"speed": "SC1"}}})
    assert "weighting 'sample'" in _problems(sampled)


def test_a_tag_fed_channel_needs_no_topic_to_serve_and_its_tags_are_subscribed() -> None:
    config = parse_config(_config({"tags": {"output": "FT1", "inputs": {"speed": "SC1"}}}))
    assert config.require_topics() == {}
    topics = _subscriptions(config, tag_path_of(config))
    assert topics == {"p/FT1": None, "p/SC1": None}


def test_a_channel_naming_a_tag_no_entry_names_is_refused_with_the_tag() -> None:
    config = parse_config(_config({"tags": {"output": "FT9", "inputs": {"speed": "SC1"}}}))
    with pytest.raises(ConfigError) as info:
        tag_path_of(config)
    assert any("FT9" in problem for problem in info.value.problems)


def test_a_tag_pattern_that_would_take_a_channel_topic_or_the_dead_letter_topic_is_refused() -> None:
    data = _config({"tags": {"output": "FT1", "inputs": {"speed": "SC1"}}})
    data["tags"]["tag"].append({"id": "{1}", "topic": "p/+"})
    data["channels"]["whole"] = {"terms": ["1"], "topic": "p/whole"}
    data["broker"] = {"dead_letter_topic": "p/dead"}
    # The exact tags p/FT1 and p/SC1 overlap the pattern too: the registry refuses that first.
    data["tags"]["tag"] = data["tags"]["tag"][2:]
    config = parse_config(data)
    with pytest.raises(ConfigError) as info:
        _subscriptions(config, tag_path_of(config))
    assert info.value.problems == ["tags: topic 'p/+' takes channel whole's topic 'p/whole' as a tag",
                                   "tags: topic 'p/+' takes broker.dead_letter_topic 'p/dead' as a tag"]


def test_tag_lists_are_read_beside_the_configuration_file(tmp_path: Path) -> None:
    (tmp_path / "plant_tags.csv").write_text("id,topic,unit\nFT1,p/FT1,m3/h\nSC1,p/SC1,1\n", encoding="utf-8")
    (tmp_path / "rwls.toml").write_text(
        'tags = { files = ["plant_tags.csv"] }\n'
        '[channels.flow]\nterms = ["1", "speed"]\n'
        '[channels.flow.tags]\noutput = "FT1"\ninputs = { speed = "SC1" }\n', encoding="utf-8")
    config = load_config(tmp_path / "rwls.toml", environ={})
    assert config.tags.files == (str(tmp_path / "plant_tags.csv"),)
    path = tag_path_of(config)
    assert path is not None and path.channel_ids == ("flow",)
    assert sorted(path.subscriptions()) == ["p/FT1", "p/SC1"]
