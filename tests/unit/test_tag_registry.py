"""Topic to tag: exact topics, + and # patterns, ids from levels, conflicts; tag lists from CSV with line numbers."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from service.broker_link.payload import Refusal
from service.config.tag_settings import ChannelTagsConfig, TagConfig, TagFormatConfig, TagsConfig
from service.tags.registry import REGISTRY_REASONS, ListedTag, TagConfigError, TagMatch, TagRegistry
from service.tags.tag_list import MAX_PROBLEMS, read_tag_list
from service.tags.tag_payload import JsonTagDecoder, NumberTagDecoder, TagReading

GATEWAY = TagFormatConfig(kind="json", value="/v")


def _listed(*entries: tuple[str, str] | tuple[str, str, dict[str, object]]) -> list[ListedTag]:
    listed = []
    for i, entry in enumerate(entries):
        extra = entry[2] if len(entry) == 3 else {}
        listed.append(ListedTag(TagConfig.model_validate({"id": entry[0], "topic": entry[1], **extra}),
                                f"entry{i}"))
    return listed


def _registry(*entries: tuple[str, str] | tuple[str, str, dict[str, object]], **kwargs: int) -> TagRegistry:
    return TagRegistry(_listed(*entries), {"gateway": GATEWAY}, **kwargs)


def _id(result: TagMatch | Refusal | None) -> str | None:
    if result is None:
        return None
    assert isinstance(result, TagMatch), result
    return result.tag_id


def _refusal(result: TagMatch | Refusal | None) -> str:
    assert isinstance(result, Refusal), result
    assert result.reason in REGISTRY_REASONS
    return result.reason


# --- lookups ---------------------------------------------------------------------------------------------------


def test_exact_topic_names_its_tag_and_decoder() -> None:
    registry = _registry(("sub7.FT-101", "plant/sub7/FT-101"), ("sub7.PT-3", "plant/sub7/PT-3", {"format": "gateway"}))
    flow = registry.resolve("plant/sub7/FT-101")
    assert isinstance(flow, TagMatch) and flow.tag_id == "sub7.FT-101"
    assert isinstance(flow.decoder, NumberTagDecoder)
    pressure = registry.resolve("plant/sub7/PT-3")
    assert isinstance(pressure, TagMatch) and isinstance(pressure.decoder, JsonTagDecoder)
    assert pressure.decoder.decode(b'{"v": 2}', 10.0) == TagReading(2.0, 10.0, True)
    assert registry.resolve("plant/sub7") is None
    assert registry.resolve("plant/sub7/FT-101/x") is None


def test_plus_pattern_takes_the_id_from_levels() -> None:
    registry = _registry(("{1}.{2}", "plant/+/+/value"))
    assert _id(registry.resolve("plant/area1/FT-101/value")) == "area1.FT-101"
    assert _id(registry.resolve("plant/area1/FT-101")) is None
    assert _id(registry.resolve("plant/area1/FT-101/value/x")) is None
    assert _id(registry.resolve("other/area1/FT-101/value")) is None


def test_hash_pattern_matches_one_or_more_levels() -> None:
    registry = _registry(("s7:{#}", "site7/#"))
    assert _id(registry.resolve("site7/boiler")) == "s7:boiler"
    assert _id(registry.resolve("site7/boiler/TT-3")) == "s7:boiler/TT-3"
    assert _id(registry.resolve("site7")) is None          # MQTT's site7/# would deliver this; no tag is named


def test_leading_wildcard_does_not_match_dollar_topics() -> None:
    plus = _registry(("{0}", "+/value"))
    assert _id(plus.resolve("FT-1/value")) == "FT-1"
    assert _id(plus.resolve("$SYS/value")) is None
    hash_only = _registry(("{#}", "#"))
    assert _id(hash_only.resolve("x/y")) == "x/y"
    assert _id(hash_only.resolve("$SYS/broker")) is None
    dollar = _registry(("{1}", "$SYS/+"))
    assert _id(dollar.resolve("$SYS/broker")) == "broker"


def test_exact_beats_pattern() -> None:
    registry = _registry(("{1}", "plant/+"), ("special", "plant/FT-1"))
    assert _id(registry.resolve("plant/FT-1")) == "special"
    assert _id(registry.resolve("plant/FT-2")) == "FT-2"


def test_literal_branch_that_fails_deeper_falls_back_to_plus() -> None:
    # plant/a/+/x and plant/+/b/y do not overlap; the topic plant/a/b/y goes down the literal 'a' first.
    registry = _registry(("{2}", "plant/a/+/x"), ("{1}", "plant/+/b/y"))
    assert _id(registry.resolve("plant/a/b/y")) == "a"
    assert _id(registry.resolve("plant/a/b/x")) == "b"


def test_pattern_topics_are_remembered() -> None:
    registry = _registry(("{1}", "plant/+"))
    first = registry.resolve("plant/FT-1")
    assert registry.resolve("plant/FT-1") is first
    assert registry.export_bindings() == [("plant/FT-1", "FT-1")]


# --- refusals at run time --------------------------------------------------------------------------------------


def test_an_id_two_topics_name_goes_to_the_first() -> None:
    registry = _registry(("{3}", "gw/+/tags/+"))       # the gateway level is left out of the id
    assert _id(registry.resolve("gw/east/tags/FT-1")) == "FT-1"
    assert _refusal(registry.resolve("gw/west/tags/FT-1")) == "tag_id_taken"
    assert _id(registry.resolve("gw/east/tags/FT-1")) == "FT-1"


def test_a_pattern_cannot_take_an_exact_tags_id() -> None:
    registry = _registry(("FT-1", "direct/FT-1"), ("{1}", "gw/+"))
    assert _refusal(registry.resolve("gw/FT-1")) == "tag_id_taken"
    assert _id(registry.resolve("direct/FT-1")) == "FT-1"


def test_a_template_that_gives_a_bad_id_is_refused() -> None:
    registry = _registry(("{1}", "gw/+"))
    assert _refusal(registry.resolve("gw/")) == "bad_tag_id"            # an empty level: an empty id
    assert _refusal(registry.resolve("gw/ FT-1")) == "bad_tag_id"       # white space at the start
    assert registry.export_bindings() == []


def test_pattern_tags_are_bounded() -> None:
    registry = _registry(("{1}", "gw/+"), max_pattern_tags=2)
    assert _id(registry.resolve("gw/a")) == "a"
    assert _id(registry.resolve("gw/b")) == "b"
    assert _refusal(registry.resolve("gw/c")) == "too_many_tags"
    assert _id(registry.resolve("gw/a")) == "a"                          # named ones still resolve


def test_bindings_round_trip_keeps_who_came_first() -> None:
    entries = (("{3}", "gw/+/tags/+"), ("exact", "gw/x/tags/exact"))
    registry = _registry(*entries)
    registry.resolve("gw/west/tags/FT-1")
    registry.resolve("gw/east/tags/FT-2")
    restored = _registry(*entries)
    assert restored.import_bindings(registry.export_bindings()) == []
    assert _refusal(restored.resolve("gw/east/tags/FT-1")) == "tag_id_taken"
    assert restored.export_bindings() == registry.export_bindings()
    with pytest.raises(ValueError, match="named no tags yet"):
        restored.import_bindings([])


def test_bindings_the_configuration_no_longer_gives_are_dropped() -> None:
    old = _registry(("{1}", "gw/+"))
    for topic in ("gw/a", "gw/b", "gw/c"):
        old.resolve(topic)
    new = _registry(("{1}.pv", "gw/+"), ("b", "gw/b"))
    assert new.import_bindings(old.export_bindings()) == ["gw/a", "gw/b", "gw/c"]
    same = _registry(("{1}", "gw/+"), ("b", "gw/b"))
    assert same.import_bindings([*old.export_bindings(), ("elsewhere/x", "x")]) == ["gw/b", "elsewhere/x"]
    assert same.export_bindings() == [("gw/a", "a"), ("gw/c", "c")]


# --- configuration errors --------------------------------------------------------------------------------------


def test_every_conflict_is_reported_with_its_source() -> None:
    with pytest.raises(TagConfigError) as caught:
        _registry(("a", "t/a"), ("a", "t/other"), ("b", "t/a"), ("c", "t/c", {"format": "xml"}),
                  ("{1}", "p/+"), ("{0}", "+/q"), ("{#}", "p/#"), ("{1}", "r/+/s"), ("{1}", "r/+/t"))
    assert caught.value.problems == [
        "entry1: tag id 'a' is already defined (entry0)",
        "entry2: topic 't/a' is already tag 'a' (entry0)",
        "entry3: tag 'c': unknown format 'xml' (known: gateway, number)",
        "entry5: pattern '+/q' overlaps pattern 'p/+' (entry4): a topic such as 'p/q' would be two tags",
        "entry6: pattern 'p/#' overlaps pattern 'p/+' (entry4): a topic such as 'p/x' would be two tags",
        "entry6: pattern 'p/#' overlaps pattern '+/q' (entry5): a topic such as 'p/q' would be two tags",
    ]


def test_identical_patterns_overlap() -> None:
    with pytest.raises(TagConfigError, match=r"entry1: pattern 'a/\+' overlaps pattern 'a/\+' \(entry0\)"):
        _registry(("{1}", "a/+"), ("x{1}", "a/+"))


def test_from_config_labels_inline_entries_and_takes_listed_ones() -> None:
    config = TagsConfig.model_validate({"formats": {"gateway": {"kind": "json", "value": "/v"}},
                                        "tag": [{"id": "a", "topic": "t/a"}]})
    with pytest.raises(TagConfigError, match=r"^plant.csv:3: tag id 'a' is already defined \(tags.tag\[0\]\)$"):
        TagRegistry.from_config(config, [ListedTag(TagConfig(id="a", topic="t/b"), "plant.csv:3")])
    registry = TagRegistry.from_config(config, [ListedTag(TagConfig(id="{1}", topic="g/+", format="gateway"),
                                                          "plant.csv:3")])
    assert registry.subscriptions() == ("t/a", "g/+")


# --- channels --------------------------------------------------------------------------------------------------


def test_channel_tag_ids_must_be_nameable() -> None:
    registry = _registry(("FT-1", "t/FT-1", {"max_age": 5.0}), ("{1}", "gw/+"), ("{1}.pv", "old/+", {"max_age": 9.0}))
    channels = {"flow": ChannelTagsConfig(output="FT-1", inputs={"u": "SC-1"}),
                "odd": ChannelTagsConfig(output="x/y", inputs={"u": "SC-1.pv"})}
    assert registry.check_channels(channels) == [
        "channels.odd.tags.output: no tag 'x/y' (no entry lists it and no pattern can name it)",
        "channels.odd.tags.inputs.u: tag 'SC-1.pv' could come from patterns 'gw/+' (entry1), 'old/+' (entry2) "
        "with different max_age; list it as a tag of its own",
    ]
    assert registry.max_ages(["FT-1", "SC-1"]) == {"FT-1": 5.0, "SC-1": math.inf}
    with pytest.raises(TagConfigError, match="'x/y': no entry can name it"):
        registry.max_ages(["x/y"])


# --- tag lists -------------------------------------------------------------------------------------------------


def _write(tmp_path: Path, text: str, name: str = "tags.csv") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_tag_list_reads_every_column(tmp_path: Path) -> None:
    path = _write(tmp_path, "\ufeffid,topic,format,unit,description,max_age\n"
                            "sub7.FT-101,plant/sub7/FT-101,number,m3/h,supply flow,60\n"
                            "\n"
                            " sub7.SC-101 , plant/sub7/SC-101 ,,%,\"pump speed, drive 1\",\n"
                            "{1}.{2},gw/+/+/value,gateway,,,inf\n")
    listed = read_tag_list(path)
    assert [item.source for item in listed] == [f"{path}:2", f"{path}:4", f"{path}:5"]
    flow, speed, gateway = (item.tag for item in listed)
    assert (flow.id, flow.topic, flow.unit, flow.description, flow.max_age) == \
        ("sub7.FT-101", "plant/sub7/FT-101", "m3/h", "supply flow", 60.0)
    assert (speed.id, speed.format, speed.description, speed.max_age) == \
        ("sub7.SC-101", "number", "pump speed, drive 1", math.inf)
    assert gateway.pattern is not None and gateway.format == "gateway"
    registry = TagRegistry(listed, {"gateway": GATEWAY})
    assert _id(registry.resolve("gw/sub7/PT-4/value")) == "sub7.PT-4"


def test_tag_list_columns_in_any_order_and_only_the_required(tmp_path: Path) -> None:
    listed = read_tag_list(_write(tmp_path, "topic,id\nt/a,a\n"))
    assert [(item.tag.id, item.tag.topic) for item in listed] == [("a", "t/a")]


def test_tag_list_reports_every_bad_line(tmp_path: Path) -> None:
    path = _write(tmp_path, "id,topic,max_age\n"
                            "ok,t/ok,\n"
                            "pat,a/+,\n"
                            "neg,t/neg,-1\n"
                            "word,t/word,soon\n"
                            "short,t/short\n"
                            ",t/empty,\n"
                            "\" spaced \",t/spaced,\n")       # cells are stripped: a good id
    with pytest.raises(TagConfigError) as caught:
        read_tag_list(path)
    assert caught.value.problems == [
        f"{path}:3: id 'pat' of pattern 'a/+' needs a placeholder ({{n}} or {{#}}), or every topic it matches "
        "would name the same tag",
        f"{path}:4: max_age: Input should be greater than 0",
        f"{path}:5: max_age: must be seconds (a number), or empty for unbounded, got 'soon'",
        f"{path}:6: 2 fields, the header has 3",
        f"{path}:7: tag id must be 1-256 characters, got 0",
    ]


def test_tag_list_line_numbers_count_quoted_newlines(tmp_path: Path) -> None:
    path = _write(tmp_path, "id,topic,description\nok,t/ok,\"two\nlines\"\nbad,a/+,\n")
    with pytest.raises(TagConfigError, match=rf"^{path}:4: id 'bad'"):
        read_tag_list(path)


@pytest.mark.parametrize(("text", "message"), [
    ("", "empty file"),
    ("id,topic,maxage\n", "unknown column(s) 'maxage'"),
    ("id,format\n", "header lacks column(s) topic"),
    ("id,topic,id\n", "column(s) id more than once"),
])
def test_tag_list_header_problems(tmp_path: Path, text: str, message: str) -> None:
    with pytest.raises(TagConfigError) as caught:
        read_tag_list(_write(tmp_path, text))
    assert message in caught.value.problems[0]


def test_tag_list_unreadable_files(tmp_path: Path) -> None:
    with pytest.raises(TagConfigError, match="cannot read"):
        read_tag_list(tmp_path / "absent.csv")
    path = tmp_path / "latin1.csv"
    path.write_bytes(b"id,topic\nd\xe9bit,t/x\n")
    with pytest.raises(TagConfigError, match=r"not UTF-8 \(byte 10\)"):
        read_tag_list(path)


def test_tag_list_problems_are_capped(tmp_path: Path) -> None:
    path = _write(tmp_path, "id,topic\n" + "".join(f"x{i},a/+\n" for i in range(MAX_PROBLEMS + 7)))
    with pytest.raises(TagConfigError) as caught:
        read_tag_list(path)
    assert len(caught.value.problems) == MAX_PROBLEMS + 1
    assert caught.value.problems[-1] == f"{path}: ... and 7 more problem(s) in {MAX_PROBLEMS + 7} bad row(s)"
