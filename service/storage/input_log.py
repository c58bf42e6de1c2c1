"""The input log: every message and operation the engine applies, written and synced before it is acknowledged.

A checkpoint holds the whole state as of one log position; recovery loads
the newest good checkpoint and applies the log's records after that
position, in their order, which is the order the engine applied them. MQTT
messages are acknowledged to the broker only once they are in the synced log
(manual acknowledgement), so after ``kill -9`` a message is either in the log
or still held by the broker for redelivery; per-channel ``seq``/``t`` refuses
a redelivered sample that the log already holds.

Layout: ``<dir>/inputs-<first seq>.log`` segments; a record is a 4-byte
little-endian length, the CRC-32 of the body, and the body (msgpack of
``[seq, kind, fields...]``). A torn or corrupt tail (a crash in mid-write)
is cut off at the last whole record when the log is opened.
"""

from __future__ import annotations

import contextlib
import itertools
import logging
import os
import struct
import zlib
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import msgspec

__all__ = ["InputLog", "LogRecord"]

log = logging.getLogger(__name__)

_HEADER = struct.Struct("<II")           # length, crc32
_PREFIX = "inputs-"
_SUFFIX = ".log"
LogRecord = tuple[int, str, tuple[Any, ...]]       # seq, kind ("m" message, "o" operation), fields

_encode = msgspec.msgpack.Encoder().encode
_decode = msgspec.msgpack.Decoder().decode


class InputLog:
    """An append-only, segmented, checksummed log of the engine's inputs (engine thread only).

    Parameters
    ----------
    directory : where the segments live (made if missing)
    segment_bytes : a new segment starts once the current one is this large
    """

    def __init__(self, directory: str | Path, segment_bytes: int = 64 * 1024 * 1024) -> None:
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.segment_bytes = segment_bytes
        self.last_seq = 0
        self.synced_seq = 0
        self._file: Any = None
        self._size = 0
        self._synced_size = 0
        self._pending_cut: tuple[Path, int] | None = None     # a failed write's tail still to cut off
        for path in self._segments():
            last = self._scan(path)
            if last is not None:
                self.last_seq = last
        self.synced_seq = self.last_seq

    # ------------------------------------------------------------------ files
    def _segments(self) -> list[Path]:
        found = []
        for path in self.directory.glob(f"{_PREFIX}*{_SUFFIX}"):
            digits = path.name[len(_PREFIX):-len(_SUFFIX)]
            if digits.isdigit():
                found.append((int(digits), path))
        return [p for _, p in sorted(found)]

    def _scan(self, path: Path) -> int | None:
        """Last seq in a segment; a torn or corrupt tail is cut off (the file truncated there)."""
        last, good = None, 0
        with path.open("rb") as handle:
            data = handle.read()
        position = 0
        while position + _HEADER.size <= len(data):
            length, crc = _HEADER.unpack_from(data, position)
            body = data[position + _HEADER.size: position + _HEADER.size + length]
            if len(body) < length or zlib.crc32(body) != crc:
                break
            last = int(_decode(body)[0])
            position += _HEADER.size + length
            good = position
        if good < len(data):
            log.warning("input log %s: cut a torn tail of %d bytes", path.name, len(data) - good)
            with path.open("r+b") as handle:
                handle.truncate(good)
                os.fsync(handle.fileno())
        return last

    def _open_segment(self) -> None:
        if self._pending_cut is not None:
            # A failed write's tail must go before anything is written after it: its whole records
            # carry seqs that the next write gives out again.
            path, size = self._pending_cut
            os.truncate(path, size)
            self._pending_cut = None
        if self._file is not None and self._size < self.segment_bytes:
            return
        if self._file is not None:
            self._file.close()
        path = self.directory / f"{_PREFIX}{self.last_seq + 1:020d}{_SUFFIX}"
        self._file = path.open("ab")
        self._size = self._synced_size = self._file.tell()
        _sync_directory(self.directory)

    # ----------------------------------------------------------------- writes
    def append(self, records: Sequence[tuple[str, tuple[Any, ...]]]) -> int:
        """Write records (kind, fields); returns the seq of the last. Not durable until :meth:`sync`.

        Raises
        ------
        OSError
            The write failed (a full disk, an I/O error): everything since the last successful
            :meth:`sync` is undone (file cut back, seqs given back), so the same records may be written again.
        """
        if not records:
            return self.last_seq
        try:
            self._open_segment()
            chunks = []
            seq = self.last_seq
            for kind, fields in records:
                seq += 1
                body = _encode([seq, kind, *fields])
                chunks.append(_HEADER.pack(len(body), zlib.crc32(body)))
                chunks.append(body)
            data = b"".join(chunks)
            self._file.write(data)
        except OSError:
            self._undo_unsynced()
            raise
        self.last_seq = seq
        self._size += len(data)
        return self.last_seq

    def sync(self) -> int:
        """Make everything appended durable (fsync); returns the synced seq.

        Raises
        ------
        OSError
            The flush or sync failed: what was appended since the last successful sync is undone, as
            for :meth:`append` (after a failed fsync the kernel may have dropped the pages: write again).
        """
        if self._file is not None and self.synced_seq < self.last_seq:
            try:
                self._file.flush()
                os.fdatasync(self._file.fileno())
            except OSError:
                self._undo_unsynced()
                raise
        self.synced_seq = self.last_seq
        self._synced_size = self._size
        return self.synced_seq

    def _undo_unsynced(self) -> None:
        """Back to the last synced state: the segment cut to its synced size; the next append opens a segment.

        Should the cut itself fail (the disk still failing), the next append tries it first and
        writes nothing until it succeeds."""
        file, self._file = self._file, None
        self.last_seq = self.synced_seq
        self._size = self._synced_size
        if file is None:
            return
        path = Path(file.name)
        with contextlib.suppress(OSError):
            file.close()              # a buffered writer closes its descriptor even when its last flush fails
        try:
            os.truncate(path, self._synced_size)
        except OSError as exc:
            log.warning("input log %s: could not cut back to %d bytes yet (%s)", path.name, self._synced_size, exc)
            self._pending_cut = (path, self._synced_size)
        else:
            self._pending_cut = None

    def close(self) -> None:
        if self._file is not None:
            self.sync()
            self._file.close()
            self._file = None

    # ------------------------------------------------------------------ reads
    def read_after(self, position: int) -> Iterator[LogRecord]:
        """Every record with seq > ``position``, in order."""
        if self._file is not None:
            self._file.flush()
        for path in self._segments():
            with path.open("rb") as handle:
                data = handle.read()
            offset = 0
            while offset + _HEADER.size <= len(data):
                length, crc = _HEADER.unpack_from(data, offset)
                body = data[offset + _HEADER.size: offset + _HEADER.size + length]
                if len(body) < length or zlib.crc32(body) != crc:
                    break
                offset += _HEADER.size + length
                seq, kind, *fields = _decode(body)
                if seq > position:
                    yield int(seq), str(kind), tuple(fields)

    def discard_through(self, position: int) -> int:
        """Delete the segments whose records all have seq <= ``position``; returns how many."""
        segments = self._segments()
        removed = 0
        for path, following in itertools.pairwise(segments):
            next_first = int(following.name[len(_PREFIX):-len(_SUFFIX)])
            if next_first - 1 <= position:
                path.unlink()
                removed += 1
        if removed:
            _sync_directory(self.directory)
        return removed

    def start_new_segment(self) -> None:
        """Close the current segment, so the next append opens a new one (after a checkpoint)."""
        if self._file is not None:
            self.sync()
            self._file.close()
            self._file = None
            self._size = self._synced_size = 0


def _sync_directory(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
