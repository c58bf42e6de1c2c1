"""Which tag a message's topic carries: exact topics in a dict, patterns matched level by level.

A :class:`TagRegistry` is built from every tag entry (``[[tags.tag]]`` and the rows of tag lists) and
answers :meth:`TagRegistry.resolve` for each message: the tag id, its entry and the decoder of its
payload format. Exact topics are one dict look-up. Patterns live in a tree with one node per level
(a literal level, ``+`` and ``#`` as branches), walked with the topic's levels: no regular
expression per message. A topic a pattern named once is remembered, so later messages on it are a
dict look-up too. An exact topic wins over any pattern that also matches it.

What is checked when the registry is built (:class:`TagConfigError`, one line per problem, each
naming where the entries were defined):

* a format no ``[tags.formats]`` entry defines;
* two entries with the same exact topic, or the same exact tag id;
* two patterns that some topic matches both (exact under the matching rules of
  :mod:`service.config.topic_pattern`, with a topic that would match both as the example).

What cannot be checked before messages arrive: several topics that name ONE tag id, because a
pattern's template leaves a wildcard level out (``gw/+/tags/+`` as ``{3}``, two gateways), because
two templates can spell the same id (``{1}.{2}`` from ``a.b``/``c`` and from ``a``/``b.c``), or because
a pattern names the id of an exact tag. The registry detects it when the second topic arrives: the
first topic keeps the id, every other is refused as ``tag_id_taken`` (exact tags always keep theirs).
Which topic came first is state: :meth:`TagRegistry.export_bindings` and
:meth:`TagRegistry.import_bindings` carry it across a restart, so recovery decides as the
uninterrupted run did.

Refusals of :meth:`TagRegistry.resolve` (``REGISTRY_REASONS``; a topic no entry names gives None):

``bad_tag_id``     a pattern gave an id that is not a valid tag id (an empty level as the whole id)
``tag_id_taken``   the id is an exact tag's, or another topic was first to name it
``too_many_tags``  the patterns have named ``max_pattern_tags`` tags already (a flood of new topics)
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from service.broker_link.payload import Refusal
from service.broker_link.tag_refusal import REGISTRY_REASONS, TagRefusal
from service.config.tag_settings import BUILT_IN_FORMATS, ChannelTagsConfig, TagConfig, TagFormatConfig, TagsConfig
from service.config.topic_pattern import TopicPattern, check_tag_id
from service.tags.tag_payload import JsonTagDecoder, NumberTagDecoder, make_decoder

__all__ = ["REGISTRY_REASONS", "ListedTag", "TagConfigError", "TagMatch", "TagRegistry"]



class TagConfigError(Exception):
    """The tag configuration is unusable; ``problems`` lists one line per problem, each naming its source."""

    def __init__(self, problems: list[str]) -> None:
        super().__init__("\n".join(problems))
        self.problems = problems


@dataclass(frozen=True, slots=True)
class ListedTag:
    """A tag entry and where it was defined (``tags.tag[3]``, ``plant_tags.csv:12``), for messages."""

    tag: TagConfig
    source: str


@dataclass(frozen=True, slots=True)
class TagMatch:
    """What a topic carries: the tag's id, its entry (a pattern's, for a tag a pattern names), its decoder."""

    tag_id: str
    tag: TagConfig
    decoder: NumberTagDecoder | JsonTagDecoder


@dataclass(frozen=True, slots=True)
class _PatternEntry:
    listed: ListedTag
    pattern: TopicPattern
    decoder: NumberTagDecoder | JsonTagDecoder


class _Node:
    """One level of the pattern tree: literal levels by text, then the ``+`` branch, then ``#``."""

    __slots__ = ("children", "end", "hash", "plus")

    def __init__(self) -> None:
        self.children: dict[str, _Node] = {}
        self.plus: _Node | None = None
        self.hash: _PatternEntry | None = None      # a pattern ending in '#' here: one or more levels follow
        self.end: _PatternEntry | None = None       # a pattern ending exactly here


def _insert(root: _Node, entry: _PatternEntry) -> None:
    node = root
    for level in entry.pattern.levels:
        if level == "#":
            node.hash = entry
            return
        if level == "+":
            if node.plus is None:
                node.plus = _Node()
            node = node.plus
        else:
            node = node.children.setdefault(level, _Node())
    node.end = entry


def _find(node: _Node, levels: list[str], i: int, dollar: bool) -> _PatternEntry | None:
    """The pattern matching ``levels[i:]`` below ``node``; patterns never overlap, so the first found is the one.

    Recursion only follows existing branches: its depth is bounded by the longest pattern, not by the topic.
    """
    if i == len(levels):
        return node.end
    child = node.children.get(levels[i])
    if child is not None:
        found = _find(child, levels, i + 1, False)
        if found is not None:
            return found
    if dollar:
        return None                         # a wildcard in the first level never matches a $ topic
    if node.plus is not None:
        found = _find(node.plus, levels, i + 1, False)
        if found is not None:
            return found
    return node.hash


def _example_topic(a: TopicPattern, b: TopicPattern) -> str:
    """A topic both (overlapping) patterns match, for the error message."""
    levels: list[str] = []
    for i in range(max(len(a.levels), len(b.levels))):
        mine = a.levels[i] if i < len(a.levels) else "#"
        other = b.levels[i] if i < len(b.levels) else "#"
        if mine == "#" and other == "#":
            levels.append("x")
            break
        levels.append(mine if mine not in ("+", "#") else other if other not in ("+", "#") else "x")
    return "/".join(levels)


class TagRegistry:
    """Topic to tag: exact topics, patterns, and the tags the patterns have named so far.

    Parameters
    ----------
    tags : sequence of ListedTag
        Every tag entry, in definition order.
    formats : mapping of str to TagFormatConfig
        ``[tags.formats]`` (the built-in ``number`` need not be listed).
    max_payload_bytes : int
        Largest tag message the decoders accept, in bytes.
    max_pattern_tags : int
        Most tags the patterns may name in all.

    Raises
    ------
    TagConfigError
        Unknown formats, duplicate topics or ids, overlapping patterns (every problem, one line each).
    """

    def __init__(self, tags: Sequence[ListedTag], formats: Mapping[str, TagFormatConfig], *,
                 max_payload_bytes: int = 65536, max_pattern_tags: int = 100_000) -> None:
        if max_pattern_tags < 1:
            raise ValueError(f"max_pattern_tags must be >= 1, got {max_pattern_tags}")
        decoders = {name: make_decoder(fmt, max_payload_bytes) for name, fmt in formats.items()}
        for name in BUILT_IN_FORMATS:
            decoders[name] = NumberTagDecoder(max_payload_bytes)
        problems: list[str] = []
        self._exact: dict[str, TagMatch] = {}
        exact_sources: dict[str, str] = {}
        self._exact_ids: dict[str, str] = {}            # tag id -> its topic
        id_sources: dict[str, str] = {}
        patterns: list[_PatternEntry] = []
        for listed in tags:
            tag, source = listed.tag, listed.source
            decoder = decoders.get(tag.format)
            if decoder is None:
                problems.append(f"{source}: tag {tag.id!r}: unknown format {tag.format!r} "
                                f"(known: {', '.join(sorted(decoders))})")
                continue
            if tag.pattern is not None:
                patterns.append(_PatternEntry(listed, tag.pattern, decoder))
                continue
            if tag.topic in exact_sources:
                problems.append(f"{source}: topic {tag.topic!r} is already tag "
                                f"{self._exact[tag.topic].tag_id!r} ({exact_sources[tag.topic]})")
                continue
            if tag.id in id_sources:
                problems.append(f"{source}: tag id {tag.id!r} is already defined ({id_sources[tag.id]})")
                continue
            self._exact[tag.topic] = TagMatch(tag.id, tag, decoder)
            exact_sources[tag.topic] = id_sources[tag.id] = source
            self._exact_ids[tag.id] = tag.topic
        problems += self._overlaps(patterns)
        if problems:
            raise TagConfigError(problems)
        self._patterns = tuple(patterns)
        self._root = _Node()
        for entry in patterns:
            _insert(self._root, entry)
        self.max_pattern_tags = max_pattern_tags
        self._bound: dict[str, TagMatch] = {}           # topic -> match, for topics a pattern named
        self._bound_ids: dict[str, str] = {}            # tag id -> the topic that named it first

    @classmethod
    def from_config(cls, config: TagsConfig, listed: Iterable[ListedTag] = ()) -> TagRegistry:
        """The registry of ``[tags]``: its ``[[tags.tag]]`` entries first, then ``listed`` (tag list rows)."""
        inline = [ListedTag(tag, f"tags.tag[{i}]") for i, tag in enumerate(config.tag)]
        return cls([*inline, *listed], config.formats, max_payload_bytes=config.max_payload_bytes,
                   max_pattern_tags=config.max_pattern_tags)

    @staticmethod
    def _overlaps(patterns: Sequence[_PatternEntry]) -> list[str]:
        # Bucketed by first level: a literal first level can only meet the same literal or a wildcard.
        by_first: dict[str, list[int]] = {}
        for i, entry in enumerate(patterns):
            by_first.setdefault(entry.pattern.levels[0], []).append(i)
        wild = by_first.get("+", []) + by_first.get("#", [])
        problems = []
        for i, entry in enumerate(patterns):
            first = entry.pattern.levels[0]
            earlier = range(i) if first in ("+", "#") else sorted(j for j in [*by_first[first], *wild] if j < i)
            for j in earlier:
                other = patterns[j]
                if entry.pattern.overlaps(other.pattern):
                    problems.append(f"{entry.listed.source}: pattern {entry.pattern.topic!r} overlaps pattern "
                                    f"{other.pattern.topic!r} ({other.listed.source}): a topic such as "
                                    f"{_example_topic(entry.pattern, other.pattern)!r} would be two tags")
        return problems

    # ------------------------------------------------------------------------------------------ lookup
    def resolve(self, topic: str) -> TagMatch | Refusal | None:
        """The tag ``topic`` carries; a :class:`Refusal` (``REGISTRY_REASONS``); None when no entry names it."""
        match = self._exact.get(topic)
        if match is not None:
            return match
        match = self._bound.get(topic)
        if match is not None:
            return match
        if not self._patterns:
            return None
        levels = topic.split("/")
        entry = _find(self._root, levels, 0, topic.startswith("$"))
        if entry is None:
            return None
        return self._bind(topic, entry, entry.pattern.tag_id(levels))

    def decoder_for(self, topic: str) -> NumberTagDecoder | JsonTagDecoder | None:
        """The decoder :meth:`resolve` would name for ``topic`` (None: no entry names it), without binding
        anything: the same answer in any process holding a copy of this registry (the ingest process
        decodes tag messages with it; the engine still resolves which tag each one is)."""
        match = self._exact.get(topic) or self._bound.get(topic)
        if match is not None:
            return match.decoder
        if not self._patterns:
            return None
        entry = _find(self._root, topic.split("/"), 0, topic.startswith("$"))
        return None if entry is None else entry.decoder

    def _bind(self, topic: str, entry: _PatternEntry, tag_id: str) -> TagMatch | Refusal:
        try:
            check_tag_id(tag_id)
        except ValueError as exc:
            return Refusal(TagRefusal.BAD_TAG_ID, f"pattern {entry.pattern.topic[:40]!r}: {str(exc)[:80]}", None)
        owner = self._exact_ids.get(tag_id) or self._bound_ids.get(tag_id)
        if owner is not None:
            return Refusal(TagRefusal.TAG_ID_TAKEN, f"tag {tag_id[:40]!r} is named by topic {owner[:60]!r}", None)
        if len(self._bound) >= self.max_pattern_tags:
            return Refusal(TagRefusal.TOO_MANY_TAGS, f"the patterns named {self.max_pattern_tags} tags already", None)
        match = TagMatch(tag_id, entry.listed.tag, entry.decoder)
        self._bound[topic] = match
        self._bound_ids[tag_id] = topic
        return match

    def subscriptions(self) -> tuple[str, ...]:
        """Every topic and pattern to subscribe to, in definition order (patterns as MQTT filters)."""
        return (*self._exact, *(entry.pattern.topic for entry in self._patterns))

    # ----------------------------------------------------------------------------- tag ids, channels
    def sources_of(self, tag_id: str) -> list[ListedTag]:
        """The entries that can name ``tag_id``: its exact entry alone, else every pattern whose template can."""
        topic = self._exact_ids.get(tag_id)
        if topic is not None:
            return [ListedTag(self._exact[topic].tag, "")]
        return [entry.listed for entry in self._patterns if entry.pattern.could_name(tag_id)]

    def check_channels(self, channels: Mapping[str, ChannelTagsConfig]) -> list[str]:
        """Problems with the tag ids channels name (``channels.<id>.tags...: message``); empty when none."""
        problems = []
        for channel_id, config in channels.items():
            named = [("output", config.output), *((f"inputs.{name}", tag) for name, tag in config.inputs.items())]
            for key, tag_id in named:
                sources = self.sources_of(tag_id)
                if not sources:
                    problems.append(f"channels.{channel_id}.tags.{key}: no tag {tag_id!r} (no entry lists it "
                                    "and no pattern can name it)")
                elif len({listed.tag.max_age for listed in sources}) > 1:
                    where = ", ".join(f"{listed.tag.topic!r} ({listed.source})" for listed in sources)
                    problems.append(f"channels.{channel_id}.tags.{key}: tag {tag_id!r} could come from patterns "
                                    f"{where} with different max_age; list it as a tag of its own")
        return problems

    def max_ages(self, tag_ids: Iterable[str]) -> dict[str, float]:
        """Each tag's ``max_age`` in seconds (inf: unbounded), for the sample assembly.

        Raises
        ------
        TagConfigError
            An id no entry can name, or patterns that disagree (see :meth:`check_channels`).
        """
        ages, problems = {}, []
        for tag_id in dict.fromkeys(tag_ids):
            found = {listed.tag.max_age for listed in self.sources_of(tag_id)}
            if len(found) != 1:
                problems.append(f"tag {tag_id!r}: " + ("no entry can name it" if not found else
                                                       "patterns that can name it disagree on max_age"))
            else:
                ages[tag_id] = found.pop()
        if problems:
            raise TagConfigError(problems)
        return ages

    # ---------------------------------------------------------------------------------------- state
    def export_bindings(self) -> list[tuple[str, str]]:
        """``(topic, tag id)`` of every tag a pattern named, in the order they were first seen."""
        return [(topic, match.tag_id) for topic, match in self._bound.items()]

    def import_bindings(self, bindings: Iterable[tuple[str, str]]) -> list[str]:
        """Take back exported bindings, in their order, into a registry that has named none yet.

        A binding the configuration no longer gives (the topic is now an exact tag, no pattern
        matches it, or its pattern names another id) is dropped.

        Returns
        -------
        list of str
            The topics dropped.

        Raises
        ------
        ValueError
            This registry has named tags already.
        """
        if self._bound:
            raise ValueError("import_bindings needs a registry that has named no tags yet")
        dropped = []
        for topic, tag_id in bindings:
            if topic in self._exact:
                dropped.append(topic)
                continue
            levels = topic.split("/")
            entry = _find(self._root, levels, 0, topic.startswith("$")) if self._patterns else None
            if entry is None or entry.pattern.tag_id(levels) != tag_id \
                    or not isinstance(self._bind(topic, entry, tag_id), TagMatch):
                dropped.append(topic)
        return dropped
