"""Checkpoints, recovery and history: the engine's state made durable, and taken back exactly after a crash.

Recovery is exact because the state is a function of the inputs in order:

1. every message and operation is written to the input log and synced before
   it applies (and MQTT messages are acknowledged only then), so nothing the
   broker stopped holding is lost;
2. a checkpoint is the whole state (every array of the bank, the alarms, the
   counters, per-channel ordering) as of one input-log position, written in
   one transaction with the journal entries made since the last checkpoint;
3. recovery loads the newest checkpoint that passes its checksum (else the
   one before), applies the log's records after its position in their order
   (the same arithmetic gives the same bits, and the same transitions get
   the same journal numbers), then ingest resumes: the broker redelivers what
   was not acknowledged, and per-channel ``seq``/``t`` refuses what the log
   already held.

Alarm notifications (MQTT, webhooks, the event stream) of the reapplied part
may go out a second time: at least once. The stale alarm follows the wall
clock, not the inputs.
"""

from __future__ import annotations

import io
import json
import logging
import math
import threading
import time
import zipfile
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np
import sqlalchemy.exc

from estimator import export_state, import_state
from service.alarms.journal import Journal
from service.broker_link.messages import Message
from service.engine.host_faults import FaultPart, HostFaults
from service.engine.operations import operation_from_record
from service.engine.snapshot import ChannelEntry
from service.engine.writer import EngineStats
from service.storage.input_log import InputLog
from service.storage.store import KEEP_CHECKPOINTS, Store

if TYPE_CHECKING:
    from service.engine.writer import Engine

__all__ = ["CorruptCheckpoint", "Persistence", "StoreUnavailable", "decode_checkpoint", "encode_checkpoint"]

log = logging.getLogger(__name__)

REPLAY_BATCH = 2000
_META = "__meta__"


class StoreUnavailable(RuntimeError):
    """The store did not answer a read (the service goes on; ``/ready`` names the fault)."""


class CorruptCheckpoint(ValueError):
    """A checkpoint body that does not decode (never raised for a good one)."""


def encode_checkpoint(arrays: dict[str, np.ndarray], meta: dict[str, Any]) -> bytes:
    """Arrays (exact, in .npy form) and the JSON-able rest in one .npz blob; no pickles."""
    buffer = io.BytesIO()
    members: dict[str, Any] = {**arrays, _META: np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)}
    np.savez(buffer, **members)
    return buffer.getvalue()


def decode_checkpoint(body: bytes) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    try:
        with np.load(io.BytesIO(body), allow_pickle=False) as data:
            arrays = {name: data[name] for name in data.files}
        meta = json.loads(arrays.pop(_META).tobytes())
    except (ValueError, KeyError, OSError, EOFError, zipfile.BadZipFile) as exc:
        raise CorruptCheckpoint(f"{type(exc).__name__}: {exc}") from None
    return arrays, meta


class Persistence:
    """The store and the input log of one engine: checkpoints, recovery, history, the journal's durable part.

    Parameters
    ----------
    checkpoint_seconds : a checkpoint at most this often (the engine's periodic job), and at stop
    history_step : a history row per channel at most every this many seconds (sample time, else wall)
    history_retention : rows older than this (seconds) before the newest row are deleted
    faults : where a store that cannot be reached is held (shared with the engine, whose input log keeps
        every input meanwhile); checkpoints are then retried with its backoff, not every ``checkpoint_seconds``
    """

    def __init__(self, store: Store, input_log: InputLog, *, checkpoint_seconds: float = 30.0,
                 history_step: float = 60.0, history_retention: float = 30 * 86400.0,
                 faults: HostFaults | None = None) -> None:
        self.store = store
        self.faults = faults if faults is not None else HostFaults()
        self.log = input_log
        self.checkpoint_seconds = checkpoint_seconds
        self.history_step = history_step
        self.history_retention = history_retention
        self.persisted_seq = store.last_journal_seq()
        self.last_checkpoint_at: float | None = store.latest_checkpoint_time()
        self.last_checkpoint_seconds = math.nan
        self.last_checkpoint_bytes = 0
        self.checkpoints = 0
        self._handed_seq = self.persisted_seq            # journal entries already in a checkpoint on its way
        self._positions = sorted(c.position for c in store.checkpoints())[-KEEP_CHECKPOINTS:]
        self._writer: threading.Thread | None = None
        self._history_last: dict[str, float] = {}
        self._history_rows: list[tuple[str, float, dict[str, Any]]] = []
        # Rows handed to the checkpoint writer: still served until the store has them (and handed
        # again with the next checkpoint if this one fails).
        self._history_writing: list[tuple[str, float, dict[str, Any]]] = []
        self._last_prune = 0.0
        self._recovering = False
        self._journal: Journal | None = None

    def hold_journal(self, journal: Journal) -> None:
        """Keep in ``journal``'s memory every entry the store does not have yet (call before the engine makes
        any: 400,000 start-up suppressions at 100,000 channels outnumber the journal's memory limit)."""
        self._journal = journal
        journal.durable_through(self.persisted_seq)

    # ------------------------------------------------------------ checkpoints
    def state(self, engine: Engine) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        arrays, bank_meta = export_state(engine.bank)
        stats = engine.stats
        channels = engine.bank.channel_ids
        arrays["engine.updated_at"] = np.array([engine.updated_at.get(c, np.nan) for c in channels])
        alarms_meta = None
        if engine.alarms is not None:
            alarm_arrays, alarms_meta = engine.alarms.export()
            arrays.update(alarm_arrays)
        meta = {"format": 1, "position": engine.position, "bank": bank_meta, "channels": list(channels),
                "engine": {"stats": {"messages": stats.messages, "samples_applied": stats.samples_applied,
                                     "samples_warmup": stats.samples_warmup, "rejected": dict(stats.refused),
                                     "batches": stats.batches, "redelivered": stats.redelivered,
                                     "not_formed": {c: dict(n) for c, n in stats.not_formed.items()},
                                     "tag_updates_unused": stats.tag_updates_unused,
                                     "tag_updates_not_newer": stats.tag_updates_not_newer}},
                "alarms": alarms_meta, "feed": engine.feed_state()}
        if engine.tags is not None:
            tag_arrays, meta["tags"] = engine.tags.export_state()
            arrays.update(tag_arrays)
        return arrays, meta

    def checkpoint(self, engine: Engine, *, wait: bool = True) -> bool:
        """Take a checkpoint (engine thread, or after it stopped); False if the last one is still being written.

        The state is copied and the input log starts a new segment here; encoding and the store's
        transaction run on a writer thread unless ``wait`` (at stop), so the engine pauses only for
        the copy (about 16 ms per 1,000 channels with their alarms; tests/benchmarks/test_checkpoint_cost.py).
        """
        if self._writer is not None and self._writer.is_alive():
            if not wait:
                return False
            self._writer.join()
        started = time.perf_counter()
        arrays, meta = self.state(engine)
        fresh = [] if engine.alarms is None else engine.alarms.journal.since(self._handed_seq)
        newest_seq = fresh[-1].seq if fresh else None
        entries = [e.to_dict() for e in fresh]
        if newest_seq is not None:
            self._handed_seq = newest_seq
        rows = self._history_writing + self._history_rows
        self._history_writing, self._history_rows = rows, []
        position = engine.position
        self.log.start_new_segment()
        self.last_checkpoint_at = time.time()            # due again in checkpoint_seconds, whatever happens

        def write() -> None:
            try:
                body = encode_checkpoint(arrays, meta)
                self.store.save(body, position, entries, rows)
                self._history_writing = []
                # The log is kept from the older of the two kept checkpoints on: should the newest fail
                # its checksum, the one before still has every record after it.
                self._positions = [*self._positions, position][-KEEP_CHECKPOINTS:]
                self.log.discard_through(self._positions[0])
            except Exception as exc:
                # One transaction: nothing of it is in the store. The log keeps every record after the
                # last good checkpoint until one succeeds; the fault says so once, not at every retry.
                log.debug("checkpoint at input %d failed", position, exc_info=True)
                self.faults.failed(FaultPart.STORE, exc)
                self._handed_seq = self.persisted_seq          # hand the entries again next time
                return
            self.faults.cleared(FaultPart.STORE)
            self.persisted_seq = max(self.persisted_seq, newest_seq or 0)
            if self._journal is not None:
                self._journal.durable_through(self.persisted_seq)
            self.last_checkpoint_seconds = time.perf_counter() - started
            self.last_checkpoint_bytes = len(body)
            self.checkpoints += 1

        if wait:
            write()
        else:
            self._writer = threading.Thread(target=write, name="rwls-checkpoint", daemon=True)
            self._writer.start()
        return True

    def periodic(self, engine: Engine) -> None:
        """The engine's once-a-second job: a checkpoint when one is due, history pruning now and then."""
        now = time.time()
        store_down = self.faults.fault(FaultPart.STORE) is not None
        if store_down:
            due = self.faults.wait(FaultPart.STORE) == 0.0          # the retry, on the fault's backoff
        else:
            due = self.last_checkpoint_at is None or now - self.last_checkpoint_at >= self.checkpoint_seconds
        if due:
            self.checkpoint(engine, wait=False)
        newest = max(self._history_last.values(), default=None)
        if newest is not None and not store_down and now - self._last_prune > 600.0:
            # Retention counts in the rows' own time (sample time): a replayed or compressed-time plant
            # keeps its last history_retention of history, whatever the wall clock says.
            self._last_prune = now
            try:
                self.store.prune_history(newest - self.history_retention)
            except Exception as exc:
                self.faults.failed(FaultPart.STORE, exc)

    # --------------------------------------------------------------- recovery
    def recover(self, engine: Engine) -> dict[str, Any]:
        """Load the newest good checkpoint and apply the input log after it (before the engine starts)."""
        report: dict[str, Any] = {"checkpoint": None, "position": 0, "reapplied": 0, "fresh_channels": []}
        self._recovering = True
        try:
            self._recover(engine, report)
        finally:
            self._recovering = False
        return report

    def _recover(self, engine: Engine, report: dict[str, Any]) -> None:
        for checkpoint in self.store.checkpoints():
            try:
                arrays, meta = decode_checkpoint(checkpoint.body)
                fresh = import_state(engine.bank, arrays, meta["bank"])
                self._load_engine(engine, arrays, meta, checkpoint.position)
            except (CorruptCheckpoint, ValueError, KeyError) as exc:
                log.warning("checkpoint %d unusable (%s): trying the one before", checkpoint.id, exc)
                continue
            report.update(checkpoint=checkpoint.id, position=checkpoint.position, fresh_channels=fresh)
            break
        batch: list[Message] = []
        # The whole kept log is read: records up to the checkpoint only teach the engine what it logged
        # lately (a broker may redeliver those, see service/broker_link/redelivery.py); the rest are applied.
        for seq, kind, fields in self.log.read_after(0):
            if kind == "m":
                channel, payload, source, topic, received = fields
                if source == "mqtt" and topic is not None:
                    engine.recently_logged.add(str(topic), bytes(payload))
                if seq <= engine.position:
                    continue
                batch.append(Message(channel, bytes(payload), str(source), topic, float(received)))
                if len(batch) >= REPLAY_BATCH:
                    engine.reapply(batch)
                    batch = []
            else:
                if seq <= engine.position:
                    continue
                if batch:
                    engine.reapply(batch)
                    batch = []
                name, args = fields
                try:
                    engine.apply_operation(operation_from_record(str(name), dict(args)))
                except Exception as exc:          # refused then, refused again now: the same outcome
                    log.info("reapplied operation %s refused again: %s", name, exc)
            engine.applied_through(seq)
            report["reapplied"] += 1
        if batch:
            engine.reapply(batch)
        if report["checkpoint"] is not None or report["reapplied"]:
            engine.flush_now()

    @staticmethod
    def _load_engine(engine: Engine, arrays: dict[str, np.ndarray], meta: dict[str, Any], position: int) -> None:
        if engine.tags is not None and meta.get("tags") is not None:
            # First: it may refuse the checkpoint (ValueError) before anything else of the engine changed.
            gone = engine.tags.import_state(arrays, meta["tags"])
            if any(gone.values()):
                log.info("tag state the configuration no longer has: %s", gone)
        if engine.alarms is not None and meta.get("alarms") is not None:
            engine.alarms.load(arrays, meta["alarms"])
        updated_at = {c: float(t) for c, t in zip(meta["channels"], arrays["engine.updated_at"].tolist(), strict=True)
                      if t == t}
        # The checkpoint keeps the refusal counts under their first name, "rejected".
        saved = {("refused" if name == "rejected" else name): value for name, value in meta["engine"]["stats"].items()}
        engine.restore(position=position, stats=EngineStats(**saved), updated_at=updated_at,
                       feed=meta.get("feed") or {})

    # ---------------------------------------------------------------- history
    def row_due(self, channel: str, t: float) -> bool:
        """A sample at ``t`` is ``history_step`` after the channel's last row (never while recovering)."""
        return not self._recovering and t - self._history_last.get(channel, -math.inf) >= self.history_step

    def note(self, entries: dict[str, ChannelEntry], now: float) -> None:
        """A history row for each refreshed channel whose last one is ``history_step`` old (publish hook).

        Not while recovering: the run that first applied those samples noted their rows."""
        if self._recovering:
            return
        for cid, entry in entries.items():
            if entry.applied == 0:
                continue
            last_t = entry.last_t
            t = last_t if last_t is not None else now
            if not self.row_due(cid, t):
                continue
            self._history_last[cid] = t
            view = entry.view                                 # built for the rows that are due only
            body = {"parameters": _finite(view.parameters.tolist()), "std_errors": _finite(view.std_errors.tolist()),
                    "noise_sigma": _finite(view.noise_sigma), "residual_sd": _finite(view.residual_sd),
                    "quality": entry.quality, "samples": view.applied,
                    "detectors": {k: _finite(r.statistic) for k, r in view.detectors.items()},
                    "limits": {k: _finite(r.limit) for k, r in view.detectors.items()},
                    "residual": _finite(view.last_innovation), "residual_spread": _finite(view.last_spread)}
            self._history_rows.append((cid, t, body))
        if len(self._history_rows) >= 10_000 and self.faults.fault(FaultPart.STORE) is None:
            # Between checkpoints, do not let it pile up (while the store is away, the next good
            # checkpoint takes them all).
            rows = list(self._history_rows)
            try:
                self.store.save_history(rows)           # stored first, then no longer pending: never unseen
            except Exception as exc:
                self.faults.failed(FaultPart.STORE, exc)
                return
            del self._history_rows[:len(rows)]

    def history(self, channel: str, since: float | None, until: float | None, limit: int) -> list[dict[str, Any]]:
        """The newest ``limit`` rows of a channel in [since, until], oldest first: stored, then those on
        their way to the store (a checkpoint being written), then pending; a row in two places once."""
        unsaved = [*self._history_writing, *self._history_rows]        # copies: other threads replace them
        pending = [{"t": t, **body} for cid, t, body in unsaved
                   if cid == channel and (since is None or t >= since) and (until is None or t <= until)]
        stored = self._read(lambda: self.store.history(channel, since, until, limit)) if len(pending) < limit else []
        newest = stored[-1]["t"] if stored else -math.inf
        return (stored + [row for row in pending if row["t"] > newest])[-limit:]

    def _read(self, read: Callable[[], list[dict[str, Any]]]) -> list[dict[str, Any]]:
        """A read of the store; one it cannot answer (gone away, locked) is a :class:`StoreUnavailable`."""
        try:
            return read()
        except sqlalchemy.exc.SQLAlchemyError as exc:
            self.faults.failed(FaultPart.STORE, exc)          # the periodic checkpoint's retry clears it
            raise StoreUnavailable(f"the store cannot be reached ({type(exc).__name__}); retry later") from None

    # ---------------------------------------------------------------- journal
    def journal(self, engine: Engine, after: int, limit: int, channel: str | None) -> list[dict[str, Any]]:
        """Entries with seq > after: the store's, then those not yet in a checkpoint."""
        found = self._read(lambda: self.store.journal(after, limit, channel)) if after < self.persisted_seq else []
        if len(found) < limit and engine.alarms is not None:
            start = max([after, self.persisted_seq, *(e["seq"] for e in found)])
            found += [e.to_dict() for e in engine.alarms.entries(start, limit - len(found), channel)]
        return found


def _finite(value: Any) -> Any:
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value if isinstance(value, float) and math.isfinite(value) else (None if isinstance(value, float)
                                                                           else value)
