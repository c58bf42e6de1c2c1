"""Tag topics and id templates: which MQTT topics one tag entry names, and the tag id each of them gets.

A tag entry's ``topic`` is either a concrete MQTT topic (one tag, whose ``id`` is written out) or a
PATTERN in MQTT's topic-filter syntax (MQTT 3.1.1, section 4.7): levels separated by ``/``, ``+`` for
exactly one level, ``#`` (as the last level only) for the rest. A pattern's ``id`` is a TEMPLATE that
builds each tag's id from the levels of the topic the message arrived on::

    topic "plant/+/+/value"   id "{1}.{2}"   plant/area1/FT-101/value  ->  area1.FT-101
    topic "site7/#"           id "s7:{#}"    site7/boiler/TT-3         ->  s7:boiler/TT-3

``{n}`` is level ``n`` of the topic, counted from 0, and must be a ``+`` level of the pattern; ``{#}`` is
every level the ``#`` matched, joined by ``/``. The rest of the template is literal text. A template
holds at least one placeholder and no other ``{`` or ``}``; it need not use every wildcard (a gateway
level may be left out), in which case several topics can name one id: the registry lets the first of
them have it (:mod:`service.tags.registry`).

Two matching rules, both so that every matched topic names a tag:

* ``#`` matches ONE or more levels (MQTT's ``a/#`` also matches ``a`` itself; no tag is named for it);
* as in MQTT, a pattern whose first level is a wildcard does not match a topic starting with ``$``.

Under these rules :meth:`TopicPattern.overlaps` is exact: it is True if and only if some topic matches
both patterns. Tag ids are 1-256 printable characters, without leading or trailing white space and
without ``{`` or ``}``.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

__all__ = ["HASH_LEVEL", "TopicPattern", "check_tag_id", "check_topic_name", "is_pattern", "parse_pattern"]

HASH_LEVEL = -1
"""The placeholder ``{#}`` in :attr:`TopicPattern.parts`."""

TAG_ID_MAX_CHARS = 256
_TOPIC_MAX_BYTES = 65535                 # MQTT strings carry a two-byte length prefix
_PLACEHOLDER = re.compile(r"\{(\d+|#)\}")


def check_tag_id(tag_id: str) -> str:
    """``tag_id`` itself when it is a valid tag id, else ``ValueError`` saying why."""
    if not 1 <= len(tag_id) <= TAG_ID_MAX_CHARS:
        raise ValueError(f"tag id must be 1-{TAG_ID_MAX_CHARS} characters, got {len(tag_id)}")
    if not tag_id.isprintable():
        raise ValueError(f"tag id must be printable characters, got {tag_id[:40]!r}")
    if tag_id.strip() != tag_id:
        raise ValueError(f"tag id must not start or end with white space, got {tag_id[:40]!r}")
    if "{" in tag_id or "}" in tag_id:
        raise ValueError(f"tag id must not contain braces (they mark a pattern's template), got {tag_id[:40]!r}")
    return tag_id


def _check_mqtt_string(topic: str) -> None:
    if not topic:
        raise ValueError("topic must not be empty")
    if "\x00" in topic:
        raise ValueError("topic must not contain a NUL character")
    if len(topic.encode("utf-8", "surrogatepass")) > _TOPIC_MAX_BYTES:
        raise ValueError(f"topic must be at most {_TOPIC_MAX_BYTES} bytes of UTF-8")


def is_pattern(topic: str) -> bool:
    """True when ``topic`` holds an MQTT wildcard (and so names many tags)."""
    return "+" in topic or "#" in topic


def check_topic_name(topic: str) -> str:
    """``topic`` itself when it is a concrete MQTT topic name (no wildcards), else ``ValueError``."""
    _check_mqtt_string(topic)
    if is_pattern(topic):
        raise ValueError(f"a concrete topic has no '+' or '#', got {topic!r}")
    return topic


@dataclass(frozen=True)
class TopicPattern:
    """A parsed tag pattern: its levels (``+`` and ``#`` kept as such) and its id template.

    ``parts`` is the template as a sequence of literal strings, level indexes (``{n}``) and
    :data:`HASH_LEVEL` (``{#}``).
    """

    topic: str
    template: str
    levels: tuple[str, ...]
    parts: tuple[str | int, ...]

    @property
    def has_hash(self) -> bool:
        return self.levels[-1] == "#"

    def overlaps(self, other: TopicPattern) -> bool:
        """True when at least one topic matches both patterns (exact under this module's rules)."""
        a, b = self.levels, other.levels
        if _wildcard(a[0]) != _wildcard(b[0]):
            literal = b[0] if _wildcard(a[0]) else a[0]
            if literal.startswith("$"):
                return False          # a leading wildcard never matches a $ topic
        for i in range(min(len(a), len(b))):
            if a[i] == "#" or b[i] == "#":
                return True           # '#' takes whatever one or more levels the other still has
            if a[i] != b[i] and a[i] != "+" and b[i] != "+":
                return False
        return len(a) == len(b)       # one ran out while the other needs more levels

    def tag_id(self, topic_levels: Sequence[str]) -> str:
        """The id a matched topic names (``topic_levels`` is the topic split at ``/``); not checked."""
        pieces = []
        for part in self.parts:
            if isinstance(part, str):
                pieces.append(part)
            elif part == HASH_LEVEL:
                pieces.append("/".join(topic_levels[len(self.levels) - 1:]))
            else:
                pieces.append(topic_levels[part])
        return "".join(pieces)

    def could_name(self, tag_id: str) -> bool:
        """True when some topic matching this pattern would name ``tag_id`` (configuration checks only)."""
        return _template_regex(self.parts).fullmatch(tag_id) is not None


def _wildcard(level: str) -> bool:
    return level in ("+", "#")


def _template_regex(parts: tuple[str | int, ...]) -> re.Pattern[str]:
    """A regular expression of every id the template can give; a level used twice repeats its text."""
    pattern: list[str] = []
    seen: set[int] = set()
    for part in parts:
        if isinstance(part, str):
            pattern.append(re.escape(part))
            continue
        name = "hash" if part == HASH_LEVEL else f"level{part}"
        if part in seen:
            pattern.append(f"(?P={name})")
        else:
            seen.add(part)
            pattern.append(f"(?P<{name}>.+)" if part == HASH_LEVEL else f"(?P<{name}>[^/]*)")
    return re.compile("".join(pattern), re.DOTALL)


def parse_pattern(topic: str, template: str) -> TopicPattern:
    """Parse a tag pattern and its id template; ``ValueError`` says what is wrong.

    Parameters
    ----------
    topic : str
        An MQTT topic filter with at least one ``+`` or ``#``.
    template : str
        The id template (``{n}`` for level ``n``, ``{#}`` for the levels ``#`` matched).
    """
    _check_mqtt_string(topic)
    levels = tuple(topic.split("/"))
    for index, level in enumerate(levels):
        if ("+" in level or "#" in level) and level not in ("+", "#"):
            raise ValueError(f"a wildcard must be a whole level, got level {index} {level!r} of {topic!r}")
        if level == "#" and index != len(levels) - 1:
            raise ValueError(f"'#' must be the last level, got {topic!r}")
    if not is_pattern(topic):
        raise ValueError(f"a pattern holds '+' or '#', got {topic!r}")

    parts: list[str | int] = []
    position = 0
    for match in _PLACEHOLDER.finditer(template):
        parts.append(template[position:match.start()])
        name = match.group(1)
        if name == "#":
            if levels[-1] != "#":
                raise ValueError(f"id {template!r} uses {{#}} but topic {topic!r} has no '#'")
            parts.append(HASH_LEVEL)
        else:
            index = int(name)
            if index >= len(levels) or levels[index] != "+":
                plus = [i for i, level in enumerate(levels) if level == "+"]
                raise ValueError(f"id {template!r}: {{{name}}} must name a '+' level of {topic!r} "
                                 f"(levels counted from 0; '+' at {plus or 'none'})")
            parts.append(index)
        position = match.end()
    parts.append(template[position:])
    literal = "".join(p for p in parts if isinstance(p, str))
    if "{" in literal or "}" in literal:
        raise ValueError(f"id {template!r}: braces only as {{n}} or {{#}}")
    if not any(isinstance(p, int) for p in parts):
        raise ValueError(f"id {template!r} of pattern {topic!r} needs a placeholder ({{n}} or {{#}}), "
                         "or every topic it matches would name the same tag")
    if not literal.isprintable() or template.strip() != template:
        raise ValueError(f"id {template!r}: printable characters, no white space at either end")
    return TopicPattern(topic, template, levels, tuple(p for p in parts if p != ""))
