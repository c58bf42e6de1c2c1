"""A long CSV fed through the configuration's tag path: the service's sample assembly, offline.

Each row's tag id names its update's tag; the update goes, with its time stamp, value and quality
(:func:`~service.offline.long_csv.quality_is_good`, by the tag's payload format), into the
:class:`~service.tags.assembler.SampleAssembler` of the configuration's
:class:`~service.tags.tag_path.TagPath`, the one the live engine feeds. The assembler's outcome
depends only on the sequence of updates, not on how it is cut into batches, so the rows go in
chunks of ``chunk_rows`` (whole arrays per chunk, as the engine's micro-batches) and the samples
come out the same, whatever the chunk size; each sample is handed on with the line of the output
update that formed it, and the chunk's items in line order.

What a row can be besides an update of a channel's tag:

``unknown_tag``    no tag entry of the configuration lists the id, and no pattern can name it (a bad row)
``ambiguous_tag``  patterns of payload formats with different quality rules can name the id, so
                   the row does not say which rule reads its quality (a bad row)
unused             a tag the configuration knows but no channel names: counted, no problem

A sample the assembler cannot form is no bad row either: it is counted per channel and
:class:`~service.tags.assembler.FormingRefusal` reason in :attr:`TagSamples.not_formed`, as the
service counts it.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping

import numpy as np

from estimator import Sample
from service.config.tag_settings import TagFormatConfig
from service.offline.csv_source import BadRow
from service.offline.long_csv import LongCsvSource, quality_is_good
from service.offline.sample_source import LinedSample, RowProblem
from service.tags.assembler import AssembledBatch, FormingRefusal
from service.tags.tag_path import TagPath

__all__ = ["CHUNK_ROWS", "TagSamples"]

CHUNK_ROWS = 4096
"""Rows per batch of updates given to the assembler (any size gives the same samples)."""

_GoodValues = tuple[str | int | bool, ...] | None
_Known = tuple[int | None, _GoodValues]          # assembler index (None: no channel names it), good values


class TagSamples:
    """The samples a long CSV forms through ``tags``, each with its line, and the rows that gave none.

    Parameters
    ----------
    source : the long CSV rows
    tags : the configuration's tag path (its registry names the tags, its assembler forms the samples)
    formats : ``[tags.formats]`` (for each tag's quality rule; ``number`` has none)
    chunk_rows : rows per batch of updates, >= 1

    Raises
    ------
    ValueError
        ``chunk_rows`` < 1.
    """

    def __init__(self, source: LongCsvSource, tags: TagPath, formats: Mapping[str, TagFormatConfig],
                 chunk_rows: int = CHUNK_ROWS) -> None:
        if chunk_rows < 1:
            raise ValueError(f"chunk_rows must be >= 1, got {chunk_rows}")
        self._source = source
        self._tags = tags
        self._formats = formats
        self._chunk_rows = chunk_rows
        self._known: dict[str, _Known | str] = {}
        self._order = {cid: k for k, cid in enumerate(tags.channel_ids)}
        self.total_chars = source.total_chars
        self.rows = 0
        self._not_formed: dict[str, dict[str, int]] = {}     # channel -> FormingRefusal -> count
        self.updates_unused = 0                               # updates of tags no channel names
        self.updates_not_newer = 0                            # not later than the tag's newest (kept out)

    @property
    def progress_chars(self) -> int:
        return self._source.progress_chars

    @property
    def not_formed(self) -> dict[str, dict[str, int]]:
        """Samples not formed so far: channel -> reason -> count, in configuration and check order (a copy)."""
        return {cid: {reason.value: counts[reason.value] for reason in FormingRefusal if reason.value in counts}
                for cid in self._tags.channel_ids if (counts := self._not_formed.get(cid))}

    def __iter__(self) -> Iterator[LinedSample | RowProblem]:
        lines: list[int] = []
        indexes: list[int] = []
        times: list[float] = []
        values: list[float] = []
        goods: list[bool] = []
        problems: list[RowProblem] = []
        taken = 0
        for row in self._source:
            self.rows += 1
            taken += 1
            if isinstance(row, BadRow):
                problems.append(RowProblem(row.line, row.reason, row.detail))
            else:
                known = self._look_up(row.tag)
                if isinstance(known, str):
                    problems.append(RowProblem(row.line, known, f"tag {row.tag[:40]!r}"))
                elif known[0] is None:
                    self.updates_unused += 1
                else:
                    lines.append(row.line)
                    indexes.append(known[0])
                    times.append(row.t)
                    values.append(row.value)
                    goods.append(quality_is_good(row.quality, known[1]))
            if taken >= self._chunk_rows:
                yield from self._chunk(lines, indexes, times, values, goods, problems)
                lines, indexes, times, values, goods, problems = [], [], [], [], [], []
                taken = 0
        yield from self._chunk(lines, indexes, times, values, goods, problems)

    def _chunk(self, lines: list[int], indexes: list[int], times: list[float], values: list[float],
               goods: list[bool], problems: list[RowProblem]) -> list[LinedSample | RowProblem]:
        """One batch of updates through the assembler; its samples and the chunk's problems in line order."""
        batch = self._tags.assembler.assemble(np.array(indexes, dtype=np.int64), times, values,
                                              np.array(goods, dtype=bool))
        self._count(batch)
        ordered: list[tuple[int, int, LinedSample | RowProblem]] = [(p.line, -1, p) for p in problems]
        for cid, formed in batch.samples.items():
            order = self._order[cid]
            names = formed.input_names
            for position, y, inputs, t in zip(formed.position.tolist(), formed.y.tolist(), formed.inputs.tolist(),
                                              formed.t.tolist(), strict=True):
                line = lines[position]
                sample = Sample(cid, y, dict(zip(names, inputs, strict=True)), t)
                ordered.append((line, order, LinedSample(line, sample)))
        ordered.sort(key=lambda item: (item[0], item[1]))       # a row is a problem or an update, never both
        return [item for _, _, item in ordered]

    def _count(self, batch: AssembledBatch) -> None:
        for cid, counts in batch.refusals.items():
            held = self._not_formed.setdefault(cid, {})
            for reason, n in counts.items():
                held[reason.value] = held.get(reason.value, 0) + n
        self.updates_not_newer += sum(batch.not_newer.values())

    def _look_up(self, tag_id: str) -> _Known | str:
        """The tag's assembler index and good values (cached); or the reason the row names no tag."""
        known = self._known.get(tag_id)
        if known is None:
            known = self._known[tag_id] = self._resolve(tag_id)
        return known

    def _resolve(self, tag_id: str) -> _Known | str:
        sources = self._tags.registry.sources_of(tag_id)
        if not sources:
            return "unknown_tag"
        rules = {_rule_key(self._good_values(listed.tag.format)) for listed in sources}
        if len(rules) > 1:
            return "ambiguous_tag"
        return self._tags.assembler.index_of(tag_id), self._good_values(sources[0].tag.format)

    def _good_values(self, format_name: str) -> _GoodValues:
        fmt = self._formats.get(format_name)
        return None if fmt is None or fmt.quality is None else fmt.good


def _rule_key(good: _GoodValues) -> frozenset[tuple[str, str | int | bool]] | None:
    """Good values with their types (``True`` and ``1`` are equal in Python, not in a quality rule)."""
    return None if good is None else frozenset((type(v).__name__, v) for v in good)

