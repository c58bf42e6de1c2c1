"""What an offline run reads from a history: samples, each with the line it came from, and bad rows.

Two layouts give the same stream (:class:`SampleSource`): the wide one, one sample per row
(:class:`WideSamples`, over :class:`~service.offline.csv_source.CsvSource`), and the long one, one
tag update per row, whose samples the service's tag path forms
(:class:`~service.offline.tag_feed.TagSamples`). Either way the items come in line order, so
the run, its problem list and its alarms do not depend on how a reader buffers.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

from estimator import Sample
from service.offline.csv_source import BadRow, CsvSource

__all__ = ["LinedSample", "RowProblem", "SampleSource", "WideSamples"]


@dataclass(frozen=True, slots=True)
class LinedSample:
    """A sample to apply, and the line of the row behind it (in the long layout, its output update's)."""

    line: int
    sample: Sample


@dataclass(frozen=True, slots=True)
class RowProblem:
    """A row that gave no update: ``reason`` a stable code; ``channel`` when one is known."""

    line: int
    reason: str
    detail: str = ""
    channel: str | None = None


class SampleSource(Protocol):
    """A history read as :class:`LinedSample` and :class:`RowProblem` items, in line order."""

    @property
    def rows(self) -> int:
        """Data rows read so far (bad ones included; blank ones not)."""

    @property
    def total_chars(self) -> int:
        """Size of the file, for progress."""

    @property
    def progress_chars(self) -> int:
        """Characters read so far, for progress."""

    def __iter__(self) -> Iterator[LinedSample | RowProblem]: ...


class WideSamples:
    """The wide layout: one sample per row, routed to its ``channel`` (or to the only channel there is).

    Parameters
    ----------
    path : the CSV file
    channels : channel id -> the input names it needs, in configuration order
    """

    def __init__(self, path: str | Path, channels: dict[str, Iterable[str]]) -> None:
        self._channels = frozenset(channels)
        self._only = next(iter(channels)) if len(channels) == 1 else None
        inputs = {name for names in channels.values() for name in names}
        self._source = CsvSource(path, inputs, need_channel=self._only is None)
        self.total_chars = self._source.total_chars
        self.rows = 0

    @property
    def progress_chars(self) -> int:
        return self._source.progress_chars

    def __iter__(self) -> Iterator[LinedSample | RowProblem]:
        for row in self._source:
            self.rows += 1
            if isinstance(row, BadRow):
                yield RowProblem(row.line, row.reason, row.detail)
                continue
            cid = row.channel if self._only is None else (row.channel or self._only)
            if cid is None or cid not in self._channels:
                yield RowProblem(row.line, "unknown_channel", channel=cid)
                continue
            yield LinedSample(row.line, Sample(cid, row.y, row.inputs, row.t, row.sigma, row.weight))
