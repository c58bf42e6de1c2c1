"""The tag path, from tag messages to channel samples: topic to tag, payload to reading, readings to samples.

One :class:`TagPath` holds the three steps the live engine and the offline runs share:

1. :class:`~service.tags.registry.TagRegistry` names the tag a message's topic carries (or refuses it);
2. that tag's decoder reads the payload into a value, a time stamp and a quality (or refuses it);
3. :class:`~service.tags.assembler.SampleAssembler` forms a sample of every channel whose output tag
   updated.

A refused message is a bad message (dead-lettered by the caller, with a
:class:`~service.broker_link.tag_refusal.TagRefusal`); a sample that could not be formed from good
messages is not (counted per channel by :class:`~service.tags.assembler.FormingRefusal`). A good update
of a tag that no channel names is counted as ``unused`` and otherwise let go.

Everything that decides an outcome is in the message sequence and in :meth:`TagPath.export_state`
(the kept updates, and which topic a pattern bound to which tag id first), so the same messages in the
same order give the same samples however they are cut into batches, after a restart too.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

from estimator import SampleColumns
from service.broker_link.payload import Refusal
from service.broker_link.tag_reading import TagReading
from service.config.settings import ConfigError, RwlsConfig
from service.tags.assembler import AssembledBatch, ChannelSamples, SampleAssembler
from service.tags.registry import TagConfigError, TagMatch, TagRegistry
from service.tags.tag_list import read_tag_list
from service.tags.tag_payload import TagDecoder

__all__ = ["TagBatch", "TagPath", "TaggedMessage", "sample_columns", "tag_path_of"]

_STATE_PREFIX = "tags."


class TaggedMessage(Protocol):
    """What the tag path reads of a message: its topic, its bytes and when it arrived (epoch seconds)."""

    @property
    def topic(self) -> str | None: ...

    @property
    def payload(self) -> bytes: ...

    @property
    def received(self) -> float: ...

    @property
    def reading(self) -> TagReading | Refusal | None: ...


@dataclass(frozen=True)
class TagBatch:
    """What a batch of tag messages gave.

    ``assembled``: the samples formed and the forming refusals; each sample's ``position`` is the
    index, in the messages given, of the output update that formed it.
    ``refused``: ``(index, refusal)`` of every bad message, in order.
    ``unknown``: indexes of messages whose topic no tag entry names.
    ``unused``: good updates of tags no channel names.
    """

    assembled: AssembledBatch
    refused: list[tuple[int, Refusal]]
    unknown: list[int]
    unused: int


def tag_path_of(config: RwlsConfig) -> TagPath | None:
    """:meth:`TagPath.from_config`, its problems as a :class:`ConfigError` (what commands report)."""
    try:
        return TagPath.from_config(config)
    except TagConfigError as exc:
        raise ConfigError(exc.problems) from None


def sample_columns(samples: ChannelSamples) -> SampleColumns:
    """A channel's formed samples as the estimator's columns (time stamped, no sigma, weight or seq)."""
    count = len(samples)
    nothing: list[float | None] = [None] * count
    inputs = dict(zip(samples.input_names, samples.inputs.T.tolist(), strict=True))
    return SampleColumns(samples.y.tolist(), inputs, samples.t.tolist(), nothing, list(nothing), [None] * count)


class TagPath:
    """Registry, decoders and sample assembler of the configuration's tags (see the module docstring)."""

    def __init__(self, registry: TagRegistry, assembler: SampleAssembler) -> None:
        self.registry = registry
        self.assembler = assembler
        # Topic -> (the assembler's index of its tag, None for a tag no channel names; its decoder), for
        # every topic the registry matched to a tag: a binding is for good, so one look-up per message.
        self._routes: dict[str, tuple[int | None, TagDecoder]] = {}

    @classmethod
    def from_config(cls, config: RwlsConfig) -> TagPath | None:
        """The tag path of ``config``; None when no channel is assembled from tags and no tag is listed.

        Raises
        ------
        TagConfigError
            A tag list that cannot be read, duplicate or overlapping entries, or a channel naming a tag
            no entry can name (one line per problem, each naming where).
        """
        channels = config.channel_tags()
        if not channels and not config.tags.tag and not config.tags.files:
            return None
        problems: list[str] = []
        listed = []
        for name in config.tags.files:
            try:
                listed += read_tag_list(name)
            except TagConfigError as exc:
                problems += exc.problems
        if problems:
            raise TagConfigError(problems)
        registry = TagRegistry.from_config(config.tags, listed)
        problems = registry.check_channels(channels)
        if problems:
            raise TagConfigError(problems)
        named = [tag_id for tags in channels.values() for tag_id in (tags.output, *tags.inputs.values())]
        assembler = SampleAssembler(channels, registry.max_ages(named), config.tags.history)
        return cls(registry, assembler)

    @property
    def channel_ids(self) -> tuple[str, ...]:
        """The channels assembled from tags, in configuration order."""
        return self.assembler.channel_ids

    def subscriptions(self) -> tuple[str, ...]:
        """Every MQTT topic filter the tags need."""
        return self.registry.subscriptions()

    def take(self, messages: Sequence[TaggedMessage]) -> TagBatch:
        """Resolve, decode and assemble messages in the order given (arrival order).

        A message the ingest process decoded already (``reading``) is not decoded again: both used
        the decoder the registry names for its topic.
        """
        refused: list[tuple[int, Refusal]] = []
        unknown: list[int] = []
        unused = 0
        where: list[int] = []
        tags: list[int] = []
        times: list[float] = []
        values: list[float] = []
        good: list[bool] = []
        routes = self._routes
        for i, message in enumerate(messages):
            topic = message.topic
            route = routes.get(topic) if topic is not None else None
            if route is None:
                found = self._route(topic)
                if found is None:
                    unknown.append(i)
                    continue
                if isinstance(found, Refusal):
                    refused.append((i, found))
                    continue
                route = found
            k, decoder = route
            reading = message.reading or decoder.decode(message.payload, message.received)
            if isinstance(reading, Refusal):
                refused.append((i, reading))
                continue
            if k is None:
                unused += 1
                continue
            where.append(i)
            tags.append(k)
            times.append(reading.t)
            values.append(reading.value)
            good.append(reading.good)
        assembled = self.assembler.assemble(np.array(tags, dtype=np.int64), times, values,
                                            np.array(good, dtype=bool))
        if assembled.samples:
            at = np.array(where, dtype=np.int64)
            # Built directly: dataclasses.replace costs more than the rest of a one-sample channel's share.
            assembled = AssembledBatch({cid: ChannelSamples(s.input_names, s.y, s.inputs, s.t, at[s.position])
                                        for cid, s in assembled.samples.items()},
                                       assembled.refusals, assembled.not_newer)
        return TagBatch(assembled, refused, unknown, unused)

    def _route(self, topic: str | None) -> tuple[int | None, TagDecoder] | Refusal | None:
        """A topic not seen before (or refused before): the registry's answer, remembered when it is a tag."""
        if topic is None:
            return None
        match = self.registry.resolve(topic)
        if not isinstance(match, TagMatch):
            return match
        route = self._routes[topic] = (self.assembler.index_of(match.tag_id), match.decoder)
        return route

    # -------------------------------------------------------------------------------------------- state
    def export_state(self) -> tuple[dict[str, NDArray[Any]], dict[str, object]]:
        """Arrays (keys prefixed ``tags.``) and a JSON-able description, for a checkpoint."""
        arrays, meta = self.assembler.export_state()
        return ({_STATE_PREFIX + name: array for name, array in arrays.items()},
                {"assembler": meta, "bindings": [list(pair) for pair in self.registry.export_bindings()]})

    def import_state(self, arrays: dict[str, NDArray[Any]], meta: dict[str, Any]) -> dict[str, list[str]]:
        """Take back :meth:`export_state`; returns what no longer fits the configuration (tags, topics).

        Raises
        ------
        ValueError
            Arrays whose shapes do not fit the description; nothing is changed.
        """
        own = {name.removeprefix(_STATE_PREFIX): array for name, array in arrays.items()
               if name.startswith(_STATE_PREFIX)}
        unknown = self.assembler.import_state(own, meta["assembler"])
        self._routes.clear()
        dropped = self.registry.import_bindings((str(topic), str(tag_id)) for topic, tag_id in meta["bindings"])
        return {"unknown_tags": unknown, "dropped_topics": dropped}
