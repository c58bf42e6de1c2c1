"""Configuration of plant tags: ``[tags]`` (payload formats, tags, tag lists) and a channel's ``tags`` table.

A plant publishes TAGS: one instrument signal per topic, usually one value per message, each with its
own time stamp and quality. ``[tags]`` says which topics carry which tags and how their messages read;
a channel's ``tags`` table says which tag is its output ``y`` and which tag stands behind each input.

```toml
[tags]
files = ["plant_tags.csv"]      # tag lists besides [[tags.tag]] (columns: service/tags/tag_list.py), relative
                                # to the configuration file's directory
max_payload_bytes = 4096        # bytes; a larger tag message is refused as too_large
max_pattern_tags = 100000       # tags the patterns may name in all (each new one is remembered)
history = 16                    # updates kept per tag, for outputs whose time stamps lag their inputs'

[tags.formats.gateway]          # "number" (a bare number, stamped on arrival) is built in
kind = "json"
value = "/v"                    # JSON Pointer (RFC 6901) to the value
time = "/ts"                    # optional; without it a value is stamped on arrival
time_unit = "ms"                # s | ms | iso8601
quality = "/q"                  # optional; without it every value is good
good = ["good", 192]            # quality values that count as good (JSON string, number or boolean)

[[tags.tag]]
id = "sub7.FT-101"
topic = "plant/sub7/FT-101"
format = "number"               # the default
unit = "m3/h"
description = "supply flow"
max_age = 60                    # seconds a value stays valid; leave out for unbounded (report by exception)

[[tags.tag]]
topic = "gw/+/+/value"          # a pattern: one entry names every tag below it
id = "{1}.{2}"                  # levels 1 and 2, counted from 0: gw/sub7/SC-101/value -> sub7.SC-101
format = "gateway"

[channels."sub7.flow".tags]     # ChannelTagsConfig: this channel is assembled from tags (it has no topic)
output = "sub7.FT-101"
inputs = { pump_speed = "sub7.SC-101" }
mode = "matched"                # only inputs stamped within `tolerance` before the output; default "latest"
tolerance = 0.5                 # seconds; matched mode only (latest: each input tag's max_age)
```

Pattern and template syntax: :mod:`service.config.topic_pattern`. What the registry checks across
all tags (duplicates, overlapping patterns): :mod:`service.tags.registry`.
"""

from __future__ import annotations

import math
import re
from typing import Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    StrictBool,
    StrictInt,
    StrictStr,
    field_validator,
    model_validator,
)

from service.config.topic_pattern import TopicPattern, check_tag_id, check_topic_name, is_pattern, parse_pattern

__all__ = ["BUILT_IN_FORMATS", "ChannelTagsConfig", "TagConfig", "TagFormatConfig", "TagsConfig",
           "check_json_pointer"]

# RFC 6901, section 3: json-pointer = *( "/" reference-token ); "~" only as "~0" or "~1".
_JSON_POINTER = re.compile(r"^(?:/(?:[^~/]|~[01])*)*$", re.DOTALL)
_FORMAT_NAME = re.compile(r"^[A-Za-z0-9_.-]{1,64}$")
_INPUT_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_.]*$")    # the regressor grammar's input names
_TEXT_MAX_CHARS = 256

BUILT_IN_FORMATS: tuple[str, ...] = ("number",)
"""Formats every configuration has: ``number`` is a bare number as text, stamped on arrival, always good."""


def check_json_pointer(pointer: str) -> str:
    """``pointer`` itself when it is an RFC 6901 JSON Pointer, else ``ValueError``."""
    if not _JSON_POINTER.match(pointer):
        raise ValueError(f"must be a JSON Pointer ('' or '/a/0/b'; '~' only as ~0 or ~1), got {pointer[:40]!r}")
    return pointer


class _Strict(BaseModel):
    # No coercion: ``max_age = "60"`` or ``good = "good"`` is a mistake to report, not to guess at.
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


QualityValue = StrictStr | StrictInt | StrictBool


class TagFormatConfig(_Strict):
    """``[tags.formats.<name>]``: how a tag message reads."""

    kind: Literal["number", "json"]
    value: str | None = Field(default=None, description="JSON Pointer to the value (json)")
    time: str | None = Field(default=None, description="JSON Pointer to the time stamp; none: arrival time")
    time_unit: Literal["s", "ms", "iso8601"] = Field(default="s", description="epoch seconds or ms, or ISO 8601")
    quality: str | None = Field(default=None, description="JSON Pointer to the quality; none: always good")
    good: tuple[QualityValue, ...] = Field(default=(), description="quality values that count as good")

    @field_validator("value", "time", "quality")
    @classmethod
    def _pointer(cls, value: str | None) -> str | None:
        return None if value is None else check_json_pointer(value)

    @field_validator("good", mode="before")
    @classmethod
    def _as_tuple(cls, value: object) -> object:
        return tuple(value) if isinstance(value, list) else value

    @model_validator(mode="after")
    def _fields_of_kind(self) -> TagFormatConfig:
        if self.kind == "number":
            given = [name for name in ("value", "time", "quality") if getattr(self, name) is not None]
            if given or self.good:
                raise ValueError(f"kind 'number' reads the whole message as the value; "
                                 f"{', '.join(given or ['good'])} only for kind 'json'")
            if self.time_unit != "s":
                raise ValueError("time_unit only for kind 'json' with a time pointer")
            return self
        if self.value is None:
            raise ValueError("kind 'json' needs value, a JSON Pointer to the value ('' for the whole document)")
        if self.time is None and self.time_unit != "s":
            raise ValueError("time_unit given but no time pointer (values are stamped on arrival)")
        if (self.quality is None) != (not self.good):
            raise ValueError("quality (a pointer) and good (the values that count as good) go together")
        return self


class TagConfig(_Strict):
    """One tag entry (``[[tags.tag]]`` or a row of a tag list): one tag, or a pattern naming many."""

    id: str = Field(description="the tag's id, or a pattern's id template ({n}, {#})")
    topic: str = Field(description="an MQTT topic, or a pattern with '+' and '#'")
    format: str = Field(default="number", description="a name in [tags.formats], or 'number'")
    unit: str = Field(default="", max_length=_TEXT_MAX_CHARS, description="engineering unit, for people")
    description: str = Field(default="", max_length=_TEXT_MAX_CHARS)
    max_age: float = Field(default=math.inf, gt=0.0,
                           description="seconds a value stays valid; unbounded by default (report by exception)")

    _pattern: TopicPattern | None = PrivateAttr(default=None)

    @model_validator(mode="after")
    def _topic_and_id(self) -> TagConfig:
        if is_pattern(self.topic):
            self._pattern = parse_pattern(self.topic, self.id)
        else:
            check_topic_name(self.topic)
            check_tag_id(self.id)
        return self

    @property
    def pattern(self) -> TopicPattern | None:
        """The parsed pattern when ``topic`` holds wildcards, else None (a single tag)."""
        return self._pattern


class TagsConfig(_Strict):
    """``[tags]``: payload formats, tags written out, tag list files, and the limits of the tag path."""

    files: tuple[str, ...] = Field(default=(), description="tag lists (CSV) read besides the entries here; "
                                   "relative to the configuration file's directory")
    max_payload_bytes: int = Field(default=65536, ge=1, le=1 << 24, description="bytes")
    max_pattern_tags: int = Field(default=100_000, ge=1, description="tags the patterns may name in all")
    history: int = Field(default=16, ge=1, le=1024, description="updates kept per tag")
    formats: dict[str, TagFormatConfig] = Field(default_factory=dict)
    tag: tuple[TagConfig, ...] = Field(default=(), description="tags written out in the configuration")

    @field_validator("files", "tag", mode="before")
    @classmethod
    def _as_tuple(cls, value: object) -> object:
        return tuple(value) if isinstance(value, list) else value

    @field_validator("formats")
    @classmethod
    def _format_names(cls, value: dict[str, TagFormatConfig]) -> dict[str, TagFormatConfig]:
        for name in value:
            if name in BUILT_IN_FORMATS:
                raise ValueError(f"format {name!r} is built in and cannot be redefined")
            if not _FORMAT_NAME.match(name):
                raise ValueError(f"format name {name[:40]!r} must be 1-64 of letters, digits, '_', '.', '-'")
        return value

    @model_validator(mode="after")
    def _known_formats(self) -> TagsConfig:
        known = self.format_names()
        unknown = [f"tag[{i}] ({tag.id!r}): unknown format {tag.format!r}" for i, tag in enumerate(self.tag)
                   if tag.format not in known]
        if unknown:
            raise ValueError("; ".join(unknown) + f" (known: {', '.join(sorted(known))})")
        return self

    def format_names(self) -> set[str]:
        """Every format a tag may name: the built-in ones and ``[tags.formats]``."""
        return {*BUILT_IN_FORMATS, *self.formats}


class ChannelTagsConfig(_Strict):
    """``[channels.<id>.tags]``: the tag behind the channel's output ``y`` and behind each input.

    A sample forms when the output tag updates. In ``latest`` mode each input gives its newest value
    stamped at or before the output's stamp and no older than the input tag's ``max_age``; in
    ``matched`` mode (plants that scan synchronously) the input's value must also be stamped within
    ``tolerance`` seconds before the output's: ``t_out - tolerance <= t_in <= t_out``. The output
    tag's own ``max_age`` plays no part: its update is the moment of the sample. Input names are the
    names the channel's terms (and noise model terms) use, every one of them and no other.
    """

    output: str = Field(description="tag id of the output y")
    inputs: dict[str, str] = Field(default_factory=dict, description="input name -> tag id")
    mode: Literal["latest", "matched"] = "latest"
    tolerance: float | None = Field(default=None, ge=0.0, allow_inf_nan=False, description="seconds (matched)")

    @field_validator("output")
    @classmethod
    def _output_id(cls, value: str) -> str:
        return check_tag_id(value)

    @field_validator("inputs")
    @classmethod
    def _inputs(cls, value: dict[str, str]) -> dict[str, str]:
        for name, tag_id in value.items():
            if not _INPUT_NAME.match(name) or name == "y":
                raise ValueError(f"input name {name[:40]!r} must be a letter or '_', then letters, digits, "
                                 "'_', '.' (and not 'y')")
            try:
                check_tag_id(tag_id)
            except ValueError as exc:
                raise ValueError(f"input {name!r}: {exc}") from None
        return value

    @model_validator(mode="after")
    def _consistent(self) -> ChannelTagsConfig:
        if self.output in self.inputs.values():
            raise ValueError(f"tag {self.output!r} is both the output and an input of this channel")
        if self.mode == "matched" and self.tolerance is None:
            raise ValueError("mode 'matched' needs tolerance, the seconds an input may be stamped before the output")
        if self.mode == "latest" and self.tolerance is not None:
            raise ValueError("tolerance only for mode 'matched' (in 'latest' mode each input tag's max_age applies)")
        return self
