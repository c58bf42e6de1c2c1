"""Tag configuration: patterns and id templates, formats, tag entries, a channel's tags table; errors by key."""

from __future__ import annotations

import itertools
import math
import tomllib
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from service.config.tag_settings import ChannelTagsConfig, TagConfig, TagFormatConfig, TagsConfig
from service.config.topic_pattern import HASH_LEVEL, check_tag_id, parse_pattern

# --- patterns and templates ------------------------------------------------------------------------------------


def test_template_takes_the_id_from_the_named_levels() -> None:
    pattern = parse_pattern("plant/+/+/value", "{1}.{2}")
    assert pattern.parts == (1, ".", 2)
    assert pattern.tag_id(["plant", "area1", "FT-101", "value"]) == "area1.FT-101"


def test_hash_placeholder_joins_the_levels_it_matched() -> None:
    pattern = parse_pattern("site7/#", "s7:{#}")
    assert pattern.parts == ("s7:", HASH_LEVEL)
    assert pattern.tag_id(["site7", "boiler", "TT-3"]) == "s7:boiler/TT-3"


@pytest.mark.parametrize(("topic", "template", "match"), [
    ("a/b+/c", "{1}", "wildcard must be a whole level"),
    ("a/#/c", "{1}", "'#' must be the last level"),
    ("a/+", "x", "needs a placeholder"),
    ("a/+", "{0}", r"\{0\} must name a '\+' level"),
    ("a/+", "{2}", r"\{2\} must name a '\+' level"),
    ("a/+", "{#}", "has no '#'"),
    ("a/+", "{1}}", "braces only"),
    ("a/+", "x{1", "braces only"),
    ("a/+", " {1}", "no white space"),
    ("a/+", "{1}\t", "printable"),
    ("", "{0}", "must not be empty"),
    ("a/+\x00", "{1}", "NUL"),
])
def test_bad_patterns_and_templates_say_what_is_wrong(topic: str, template: str, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        parse_pattern(topic, template)


@pytest.mark.parametrize(("a", "b", "expected"), [
    ("a/+", "+/b", True),
    ("a/+", "a/+/c", False),
    ("a/+", "a/#", True),
    ("a/b/#", "a/+", False),           # '#' needs one level or more
    ("a/#", "a/#", True),
    ("+/x", "a/+/y", False),
    ("#", "$SYS/+", False),            # a leading wildcard never matches a $ topic
    ("$SYS/+", "$SYS/#", True),
    ("+/+", "+/+/+", False),
])
def test_overlap_is_exact(a: str, b: str, expected: bool) -> None:
    pa = parse_pattern(a, "{#}" if a.endswith("#") else f"{{{a.split('/').index('+')}}}")
    pb = parse_pattern(b, "{#}" if b.endswith("#") else f"{{{b.split('/').index('+')}}}")
    assert pa.overlaps(pb) is expected
    assert pb.overlaps(pa) is expected


def _matches(levels: tuple[str, ...], topic: list[str]) -> bool:
    """Brute-force reference of the matching rules (MQTT filter, '#' one level or more, $ rule)."""
    if topic[0].startswith("$") and levels[0] in ("+", "#"):
        return False
    for i, level in enumerate(levels):
        if level == "#":
            return len(topic) > i
        if i >= len(topic) or (level != "+" and level != topic[i]):
            return False
    return len(topic) == len(levels)


_LEVEL = st.sampled_from(["a", "b", "$s", "+", "#"])


@settings(max_examples=300, deadline=None, derandomize=True, database=None)
@given(st.lists(_LEVEL, min_size=1, max_size=4), st.lists(_LEVEL, min_size=1, max_size=4))
def test_overlap_agrees_with_a_search_over_topics(a: list[str], b: list[str]) -> None:
    # Normalise the drawn levels into valid patterns: '#' only last, at least one wildcard.
    def valid(levels: list[str]) -> str:
        levels = [lv if lv != "#" else "+" for lv in levels[:-1]] + levels[-1:]
        if "+" not in levels and "#" not in levels:
            levels[-1] = "+"
        return "/".join(levels)

    def template(topic: str) -> str:
        return "{#}" if topic.endswith("#") else f"{{{topic.split('/').index('+')}}}"

    ta, tb = valid(a), valid(b)
    pa, pb = parse_pattern(ta, template(ta)), parse_pattern(tb, template(tb))
    # Every topic of up to 5 levels over the literals the patterns use, plus one they don't.
    words = ["a", "b", "$s", "z"]
    both = any(_matches(pa.levels, list(topic)) and _matches(pb.levels, list(topic))
               for n in range(1, 6) for topic in itertools.product(words, repeat=n))
    assert pa.overlaps(pb) is both


def test_could_name_follows_the_template() -> None:
    pattern = parse_pattern("gw/+/+/value", "{1}.{2}")
    assert pattern.could_name("sub7.FT-101")
    assert pattern.could_name("a.b.c")            # '{1}' may hold a dot
    assert not pattern.could_name("sub7/FT-101")  # a '+' level never holds '/'
    assert not pattern.could_name("sub7")
    twice = parse_pattern("gw/+/x", "{1}:{1}")
    assert twice.could_name("a:a") and not twice.could_name("a:b")


@pytest.mark.parametrize("tag_id", ["", "x" * 257, " lead", "trail ", "tab\there", "{brace}"])
def test_bad_tag_ids_are_refused(tag_id: str) -> None:
    with pytest.raises(ValueError, match="tag id"):
        check_tag_id(tag_id)


# --- formats ---------------------------------------------------------------------------------------------------


def test_json_format_reads_every_field() -> None:
    fmt = TagFormatConfig.model_validate({"kind": "json", "value": "/v", "time": "/ts", "time_unit": "ms",
                                          "quality": "/q", "good": ["good", 192, True]})
    assert fmt.good == ("good", 192, True)
    assert [type(v) for v in fmt.good] == [str, int, bool]


@pytest.mark.parametrize(("fields", "match"), [
    ({"kind": "number", "value": "/v"}, "only for kind 'json'"),
    ({"kind": "number", "time_unit": "ms"}, "time_unit only"),
    ({"kind": "json"}, "needs value"),
    ({"kind": "json", "value": "v"}, "JSON Pointer"),
    ({"kind": "json", "value": "/a~2"}, "JSON Pointer"),
    ({"kind": "json", "value": "/v", "time_unit": "ms"}, "no time pointer"),
    ({"kind": "json", "value": "/v", "quality": "/q"}, "go together"),
    ({"kind": "json", "value": "/v", "good": ["good"]}, "go together"),
    ({"kind": "json", "value": "/v", "quality": "/q", "good": [1.5]}, "good"),
    ({"kind": "xml", "value": "/v"}, "kind"),
    ({"kind": "json", "value": "/v", "colour": 1}, "colour"),
])
def test_bad_formats_are_refused_by_key(fields: dict[str, Any], match: str) -> None:
    with pytest.raises(ValidationError, match=match):
        TagFormatConfig.model_validate(fields)


# --- tag entries -----------------------------------------------------------------------------------------------


def test_exact_tag_has_no_pattern_and_unbounded_age_by_default() -> None:
    tag = TagConfig(id="sub7.FT-101", topic="plant/sub7/FT-101")
    assert tag.pattern is None
    assert tag.format == "number"
    assert tag.max_age == math.inf


def test_pattern_tag_keeps_its_parsed_pattern() -> None:
    tag = TagConfig(id="{1}", topic="gw/+")
    assert tag.pattern is not None and tag.pattern.parts == (1,)


@pytest.mark.parametrize(("fields", "match"), [
    ({"id": "x", "topic": "a", "max_age": 0.0}, "greater than 0"),
    ({"id": "x", "topic": "a", "max_age": math.nan}, "greater than 0"),
    ({"id": "x", "topic": "a", "max_age": "60"}, "valid number"),       # no coercion from text
    ({"id": "{0}", "topic": "a"}, "braces"),                            # a template needs a pattern
    ({"id": "x", "topic": "a/+"}, "needs a placeholder"),
    ({"id": "x", "topic": "a", "units": "m"}, "units"),
])
def test_bad_tag_entries_are_refused(fields: dict[str, Any], match: str) -> None:
    with pytest.raises(ValidationError, match=match):
        TagConfig.model_validate(fields)


def test_the_documented_example_validates() -> None:
    from service.config import tag_settings

    doc = tag_settings.__doc__ or ""
    example = doc.split("```toml")[1].split("```")[0]
    data = tomllib.loads(example)
    tags = TagsConfig.model_validate(data["tags"])
    assert [t.id for t in tags.tag] == ["sub7.FT-101", "{1}.{2}"]
    assert tags.tag[0].max_age == 60.0 and tags.tag[1].max_age == math.inf
    channel = ChannelTagsConfig.model_validate(data["channels"]["sub7.flow"]["tags"])
    assert channel.inputs == {"pump_speed": "sub7.SC-101"}


def test_tags_table_refuses_unknown_and_redefined_formats() -> None:
    with pytest.raises(ValidationError, match=r"tag\[0\] \('a'\): unknown format 'gw'"):
        TagsConfig.model_validate({"tag": [{"id": "a", "topic": "x", "format": "gw"}]})
    with pytest.raises(ValidationError, match="built in"):
        TagsConfig.model_validate({"formats": {"number": {"kind": "number"}}})


# --- a channel's tags ------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("fields", "match"), [
    ({"output": "a", "inputs": {"u": "a"}}, "both the output and an input"),
    ({"output": "a", "mode": "matched"}, "needs tolerance"),
    ({"output": "a", "tolerance": 1.0}, "only for mode 'matched'"),
    ({"output": "a", "mode": "matched", "tolerance": -1.0}, "greater than or equal to 0"),
    ({"output": "a", "mode": "matched", "tolerance": math.inf}, "finite"),
    ({"output": "a", "inputs": {"y": "b"}}, "input name"),
    ({"output": "a", "inputs": {"2u": "b"}}, "input name"),
    ({"output": "a", "inputs": {"u": " b"}}, "input 'u': tag id"),
    ({"output": "{a}"}, "braces"),
])
def test_bad_channel_tags_are_refused(fields: dict[str, Any], match: str) -> None:
    with pytest.raises(ValidationError, match=match):
        ChannelTagsConfig.model_validate(fields)


def test_matched_channel_with_zero_tolerance_is_allowed() -> None:
    channel = ChannelTagsConfig(output="a", inputs={"u": "b", "v": "b"}, mode="matched", tolerance=0.0)
    assert channel.tolerance == 0.0
