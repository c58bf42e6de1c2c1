"""The single writer: drains the ingest queue in micro-batches and owns the ChannelBank.

Everything that changes estimator state happens on the engine's own thread.
MQTT and HTTP hand raw messages over through a bounded queue (a full queue
blocks MQTT, which stops acknowledging and lets the broker hold the messages,
and makes HTTP answer 503); readers get an immutable :class:`Snapshot` that the
engine replaces after a batch (at once when the queue runs empty, at most every
``snapshot_interval`` under load), so no reader ever holds a lock on numpy state.

Per message: decode into columns (``service.broker_link.payload_columns`` for a plain
message, else the exact ``service.broker_link.payload``); then every channel's columns of
a micro-batch go to :meth:`ChannelBank.apply_columns` together, which also
refuses a ``seq`` or ``t`` that does not advance the channel's (broker
redeliveries, a source that sends again).
Every refused message or sample is counted by reason and handed to the
dead-letter callback with that reason; nothing is dropped silently.
"""

from __future__ import annotations

import bisect
import concurrent.futures
import contextlib
import logging
import queue
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol, TypeVar

from estimator import ChannelBank, ChannelSettings, SampleColumns, SampleRefusal
from service.alarms.feed import AlarmFeed
from service.alarms.lifecycle import Alarm, AlarmBook, JournalEntry
from service.broker_link.messages import DeadLetter, EngineRefusal, Message, RefusalReason
from service.broker_link.payload import PayloadRefusal, decode_payload
from service.broker_link.payload_columns import decode_columns
from service.broker_link.redelivery import RecentlyLogged
from service.broker_link.tag_refusal import TagRefusal
from service.engine.activity import ChannelActivity
from service.engine.host_faults import FaultPart, HostFaults
from service.engine.intake import Command, Intake
from service.engine.operations import Operation, operation_record
from service.engine.publisher import PublishHook, SnapshotPublisher
from service.engine.snapshot import Snapshot
from service.tags.tag_path import TagBatch, TagPath, sample_columns

__all__ = ["Command", "Engine", "EngineBusy", "EngineStats", "InputRecorder"]

T = TypeVar("T")

log = logging.getLogger(__name__)


@dataclass
class EngineStats:
    """Counters the engine thread writes and the metrics endpoint reads."""

    messages: int = 0
    samples_applied: int = 0
    samples_warmup: int = 0
    refused: dict[str, int] = field(default_factory=dict)
    batches: int = 0
    last_batch_seconds: float = 0.0
    batch_seconds_total: float = 0.0
    dead_letter_failures: int = 0
    redelivered: int = 0            # broker redeliveries of messages already logged: acknowledged, not applied
    not_formed: dict[str, dict[str, int]] = field(default_factory=dict)   # channel -> FormingRefusal -> count
    tag_updates_unused: int = 0     # good updates of tags no channel names
    tag_updates_not_newer: int = 0  # tag updates not later than the tag's newest (kept out: see assembler)

    def refuse(self, reason: str) -> None:
        self.refused[reason] = self.refused.get(reason, 0) + 1


@dataclass(frozen=True)
class _Origin:
    """The message a run of a channel's samples came from, and their indexes in it (None: a single sample)."""

    message: Message
    indexes: Sequence[int | None] | None


class _Origins:
    """Where each of a channel's samples in a micro-batch came from (runs of samples, one per message)."""

    def __init__(self, first: _Origin) -> None:
        self._starts = [0]
        self._origins = [first]

    def add(self, start: int, origin: _Origin) -> None:
        self._starts.append(start)
        self._origins.append(origin)

    def locate(self, position: int) -> tuple[Message, int | None]:
        k = bisect.bisect_right(self._starts, position) - 1
        origin = self._origins[k]
        return origin.message, None if origin.indexes is None else origin.indexes[position - self._starts[k]]


@dataclass
class _Held:
    """A batch the input log could not take: kept, in order, until a write of it succeeds."""

    batch: list[Message]                  # to log and apply
    acks: list[tuple[int, int]]           # redeliveries already logged, acknowledged with it
    taken: int                            # messages taken from the queue for it (done once applied)
    command: Command | None = None        # came after the batch: runs once the batch applied


class InputRecorder(Protocol):
    """Where the engine writes every message and operation before it applies them (the storage's input log)."""

    def append(self, records: Sequence[tuple[str, tuple[Any, ...]]]) -> int:
        """Write records ``(kind, fields)``; the sequence number of the last. OSError: nothing of them kept."""

    def sync(self) -> int:
        """Make everything appended durable. OSError: what was appended since the last sync is undone."""


class EngineBusy(RuntimeError):
    """The engine could not take or finish a command in time."""


class Engine:
    """Owns the ChannelBank; applies queued messages in micro-batches on its own thread.

    Parameters
    ----------
    channels : mapping of channel id to settings
    queue_size : bound of the message queue (messages; a batch payload is one)
    max_batch : messages per micro-batch at most (a batch payload is never split)
    max_wait : seconds a micro-batch waits to fill after its first message
    max_payload_bytes : larger payloads are refused ``too_large``
    dead_letter : called on the engine thread for every refusal; must not block for long
    stale_after : seconds without data after which a channel's quality is Uncertain (and its stale alarm on)
    snapshot_interval : under load, a new snapshot at most this often (seconds); whenever the
        queue runs empty, at once. Refreshing costs tens of microseconds per touched channel.
    alarms : the alarm book the engine keeps in step (detector events, design suppression, staleness)
    prepare : called with the new bank before anything else (configured baselines)
    input_log : every message and operation is written and synced here before it applies (recovery)
    acknowledge : called with ``(connection, message id)`` of MQTT messages once they are in the synced log
    intake : the queue to take work from, when producers need it before the engine exists (else one of
        ``queue_size``)
    periodic : jobs the engine thread runs about once a second with the engine (checkpoints)
    publish_hooks : called with the refreshed entries after each snapshot (history rows)
    publish_when : ``(channel, t)`` of a channel's newest applied sample; True publishes at once, however
        busy (a history row is due: rows follow sample time, not how batches happened to coalesce)
    tags : the tag path of the channels assembled from tags; messages without a channel go through it
    faults : where the input log's faults are held (shared with the store's checkpoints); one of its own if None
    """

    def __init__(self, channels: Mapping[str, ChannelSettings], *, queue_size: int = 100_000,
                 max_batch: int = 5000, max_wait: float = 0.005, max_payload_bytes: int = 65536,
                 dead_letter: Callable[[DeadLetter], None] | None = None, stale_after: float = 600.0,
                 snapshot_interval: float = 0.002, clock: Callable[[], float] = time.time,
                 alarms: AlarmBook | None = None, prepare: Callable[[ChannelBank], None] | None = None,
                 input_log: InputRecorder | None = None,
                 acknowledge: Callable[[list[tuple[int, int]]], None] | None = None,
                 intake: Intake | None = None,
                 periodic: Sequence[Callable[[Engine], None]] = (),
                 publish_hooks: Sequence[PublishHook] = (),
                 publish_when: Callable[[str, float], bool] | None = None,
                 tags: TagPath | None = None, faults: HostFaults | None = None) -> None:
        self.bank = ChannelBank(channels)
        self.faults = faults if faults is not None else HostFaults()
        self._held: _Held | None = None                        # a batch waiting for the input log to heal
        self._log_failing = False
        self.tags = tags
        self._fed_by_tags = frozenset(tags.channel_ids if tags is not None else ())
        self.log = input_log
        self.position = 0                                     # last input-log seq applied
        self.recently_logged = RecentlyLogged()                # MQTT messages logged lately (redeliveries)
        if prepare is not None:
            prepare(self.bank)                 # e.g. baselines from the configuration, before the first snapshot
        self.alarms = alarms
        self._feed = AlarmFeed(alarms, stale_after) if alarms is not None else None
        self.bank.take_events()                # the configured baselines: in force from the start, not news
        if self._feed is not None:
            self._feed.hold_uncommissioned({c: self.bank.baseline_version(c) is not None
                                            for c in self.bank.channel_ids}, clock())
        self._acknowledge = acknowledge
        self._periodic = tuple(periodic)
        self._publish_when = publish_when
        self._inputs = {cid: tuple(s.input_names) for cid, s in channels.items()}
        self._queue = intake if intake is not None else Intake(maxsize=queue_size)
        self._max_batch = max_batch
        self._max_wait = max_wait
        self._max_payload = max_payload_bytes
        self._dead_letter = dead_letter
        self._clock = clock
        self.activity = ChannelActivity()
        self.stats = EngineStats()
        self._thread: threading.Thread | None = None
        self._stopping = threading.Event()
        self._heartbeat = time.monotonic()
        self._last_refresh = time.monotonic()
        self.publisher = SnapshotPublisher(self.bank, self.activity, stale_after=stale_after,
                                           interval=snapshot_interval, clock=clock, alarms=alarms,
                                           feed=self._feed, hooks=publish_hooks)
        if alarms is not None:
            alarms.listen(self._on_transition)      # after the first snapshot, which has every alarm already

    # ------------------------------------------------------------- producers
    def submit(self, message: Message, timeout: float | None = None) -> bool:
        """Queue a message; blocks up to ``timeout`` (None: until there is room). False if still full."""
        return self._queue.offer(message, timeout)

    def execute(self, operation: Operation[T], timeout: float = 10.0) -> T:
        """Run an operation (:mod:`service.engine.operations`) on the engine thread, in order with the samples
        queued before it; a logged one is in the synced input log before it applies. Returns its result.

        Raises
        ------
        EngineBusy
            The queue stayed full, or the engine did not answer within ``timeout``.
        Exception
            Whatever the operation raised (an alarm action the state does not allow, for instance).
        """
        failing = self.faults.fault(FaultPart.INPUT_LOG) if operation.logged else None
        if failing is not None:
            raise EngineBusy(f"the input log cannot be written ({failing.reason}); retry later")
        command = Command(operation, concurrent.futures.Future())
        try:
            self._queue.put(command, timeout=timeout)
        except queue.Full:
            raise EngineBusy("engine queue full") from None
        try:
            return command.future.result(timeout)  # type: ignore[return-value]
        except concurrent.futures.TimeoutError:
            raise EngineBusy(f"engine did not answer within {timeout} s") from None

    def _on_transition(self, entry: JournalEntry, alarm: Alarm) -> None:
        self.publisher.alarms_changed()

    def feed_state(self) -> dict[str, object]:
        """What the alarm feed remembers (for checkpoints)."""
        if self._feed is None:
            return {}
        return {"stale": dict(self._feed.stale), "unjudged": sorted(self._feed.unjudged)}

    def restore(self, *, position: int, stats: EngineStats, updated_at: Mapping[str, float],
                feed: Mapping[str, object]) -> None:
        """Take back what a checkpoint kept of the engine's own state (recovery, before the thread starts):
        the input-log position applied, the counters, each channel's last applied time and the feed's memory.
        The alarm book was loaded beside it: the next snapshot carries its alarms."""
        self.position = position
        self.stats = stats
        known = set(self.bank.channel_ids)
        self.activity.updated_at = {c: t for c, t in updated_at.items() if c in known}
        if self._feed is not None:
            stale = feed.get("stale", {})
            unjudged = feed.get("unjudged", [])
            self._feed.stale = {str(k): bool(v) for k, v in stale.items()} if isinstance(stale, dict) else {}
            self._feed.unjudged = {str(c) for c in unjudged} if isinstance(unjudged, list) else set()
        self.publisher.alarms_changed()

    def applied_through(self, position: int) -> None:
        """Recovery applied the input log up to ``position`` (including records it skipped as done)."""
        self.position = position

    def flush_now(self) -> None:
        """Take pending events and publish a snapshot now (after recovery, before the thread starts)."""
        self._take_events()
        self.publisher.touch_all()
        self.publisher.flush()

    def touch(self, channel: str) -> None:
        """Mark a channel for the next snapshot (a command changed it)."""
        self.publisher.touch(channel)

    @property
    def queue_depth(self) -> int:
        return self._queue.qsize()

    @property
    def snapshot(self) -> Snapshot:
        """The latest snapshot (replaced, never mutated)."""
        return self.publisher.snapshot

    @property
    def updated_at(self) -> dict[str, float]:
        """Wall clock of each channel's last applied sample."""
        return self.activity.updated_at

    # ------------------------------------------------------------- lifecycle
    def start(self) -> None:
        """Start the engine thread."""
        if self._thread is not None:
            raise RuntimeError("engine already started")
        self._thread = threading.Thread(target=self._run, name="rwls-engine", daemon=True)
        self._thread.start()

    def stop(self, timeout: float = 10.0) -> None:
        """Apply what is queued, then stop the thread (bounded by ``timeout``)."""
        self._stopping.set()
        if self._thread is not None:
            with contextlib.suppress(queue.Full):
                self._queue.put(None, timeout=timeout)     # wake the thread
            self._thread.join(timeout)

    def alive(self, max_silence: float = 5.0) -> bool:
        """The thread runs and its loop went round within ``max_silence`` seconds."""
        return (self._thread is not None and self._thread.is_alive()
                and time.monotonic() - self._heartbeat < max_silence)

    def drain(self, timeout: float = 10.0) -> bool:
        """Wait until everything queued so far is applied (tests, shutdown). False on timeout."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self._queue.unfinished_tasks == 0:
                return True
            time.sleep(0.002)
        return False

    # ---------------------------------------------------------------- thread
    def _run(self) -> None:
        while True:
            self._heartbeat = time.monotonic()
            if self._held is not None:
                if not self._retry_held() and self._stopping.is_set():
                    log.error("stopping with %d messages not in the input log: MQTT ones were not acknowledged "
                              "(the broker redelivers them), HTTP ones are lost", len(self._held.batch))
                    return
                continue
            try:
                first = self._queue.get(timeout=0.25)
            except queue.Empty:
                self.publisher.flush()                         # left over from a batch under load
                if self._stopping.is_set():
                    return
                self._tick()
                continue
            batch, command = self._collect(first)
            if batch:
                self._take_batch(batch, command)
                if self._held is not None:
                    continue                                   # the command waits with the batch
            if command is not None:
                self._execute(command)
            self._tick()
            if self._stopping.is_set() and self._queue.empty():
                self.publisher.flush()
                return

    def _take_batch(self, batch: list[Message], command: Command | None) -> None:
        """Log, acknowledge and apply a micro-batch; held instead when the input log cannot take it."""
        try:
            held = not self._process(batch)
        except Exception:          # the loop must outlive any bug in one batch
            self._dead_letter_batch(batch)
            held = False
        if held and self._held is not None:
            self._held.taken, self._held.command = len(batch), command
        else:
            self._queue.task_done(len(batch))

    def _retry_held(self) -> bool:
        """Try the held batch's log write again once its backoff passed; True when it went through."""
        held = self._held
        assert held is not None
        pause = self.faults.wait(FaultPart.INPUT_LOG)
        if pause > 0.0:
            self._stopping.wait(min(pause, 0.25))
            return False
        if not self._log_batch(held.batch, held.acks):
            return False
        self._held = None
        try:
            self._apply(held.batch)
        except Exception:
            self._dead_letter_batch(held.batch)
        self._queue.task_done(held.taken)
        if held.command is not None:
            self._execute(held.command)
        return True

    def _dead_letter_batch(self, batch: list[Message]) -> None:
        """A bug met in one batch (called while handling it): its messages dead-lettered, the loop goes on."""
        log.exception("engine batch failed; %d messages dead-lettered", len(batch))
        for message in batch:
            self._refuse(message, EngineRefusal.INTERNAL_ERROR, "engine failed on this batch", None)

    def _collect(self, first: Message | Command | None) -> tuple[list[Message], Command | None]:
        """A micro-batch: messages until full, ``max_wait`` passes, or a command (which runs after them)."""
        batch: list[Message] = []
        if isinstance(first, Command):
            return batch, first
        if first is not None:
            batch.append(first)
        else:
            self._queue.task_done()
        deadline = time.monotonic() + self._max_wait
        while len(batch) < self._max_batch:
            remaining = deadline - time.monotonic()
            taken, command = self._queue.take_messages(self._max_batch - len(batch), max(remaining, 0.0))
            batch += taken
            if command is not None:
                return batch, command
            if not taken and remaining <= 0:
                break
        return batch, None

    def _execute(self, command: Command) -> None:
        try:
            if command.operation.logged and self.log is not None:
                position = self._write_log([("o", operation_record(command.operation))])
                if position is None:
                    fault = self.faults.fault(FaultPart.INPUT_LOG)
                    raise EngineBusy(f"the input log cannot be written ({fault and fault.reason}); retry later")
                self.position = position
            command.future.set_result(self.apply_operation(command.operation))
        except Exception as exc:      # the caller gets it; the loop goes on
            command.future.set_exception(exc)
        finally:
            self._queue.task_done()
        self.publisher.flush()

    def apply_operation(self, operation: Operation[T]) -> T:
        """Apply an operation now, not logged (the engine thread, or recovery before it starts)."""
        try:
            return operation.apply(self)
        finally:
            self._take_events()

    def _tick(self) -> None:
        """At most once a second: staleness, shelving expiry."""
        if time.monotonic() - self._last_refresh < 1.0:
            return
        self._last_refresh = time.monotonic()
        now = self._clock()
        if self.alarms is not None:
            self.alarms.expire(now)
        self.publisher.refresh_quality()
        for job in self._periodic:
            try:
                job(self)
            except Exception:              # a failing checkpoint must not stop the samples
                log.exception("periodic job failed")

    def _refuse(self, message: Message, reason: RefusalReason, detail: str, index: int | None,
                channel: str | None = None) -> None:
        """Count and dead-letter; ``channel`` names the channel when the message does not (a tag message)."""
        self.stats.refuse(reason)
        cid = channel or message.channel
        if cid is not None and cid in self.bank:
            self.activity.refused(cid, reason)
            self.publisher.touch(cid)
        if self._dead_letter is None:
            return
        letter = DeadLetter(reason, detail, cid, message.topic, message.source, index, message.payload)
        try:
            self._dead_letter(letter)
        except Exception:
            self.stats.dead_letter_failures += 1
            log.exception("dead-letter delivery failed reason=%s channel=%s", reason, cid)

    def _decode(self, message: Message, cid: str) -> tuple[SampleColumns, _Origin] | None:
        """A message's samples as columns: the short path when it vouches, else the exact decoder."""
        names = self._inputs[cid]
        fast = None if message.decoded is not None else decode_columns(
            message.payload, input_names=names, max_bytes=self._max_payload)
        if fast is not None:
            columns, is_batch = fast
            return columns, _Origin(message, None if not is_batch else range(len(columns)))
        decoded, refusals = message.decoded or decode_payload(
            message.payload, max_bytes=self._max_payload, input_names=names)
        for refusal in refusals:
            self._refuse(message, PayloadRefusal(refusal.reason), refusal.detail, refusal.index)
        if not decoded:
            return None
        columns = SampleColumns()
        for sample in decoded:
            columns.append(sample.y, sample.inputs, sample.t, sample.sigma, sample.weight, sample.seq)
        return columns, _Origin(message, [sample.index for sample in decoded])

    def _skip_redelivered(self, batch: list[Message]) -> tuple[list[Message], list[tuple[int, int]]]:
        """The messages to log and apply, and the acknowledgements of redeliveries already logged."""
        if not any(m.redelivered for m in batch):
            return batch, []
        kept: list[Message] = []
        acks: list[tuple[int, int]] = []
        for m in batch:
            if m.redelivered and m.topic is not None and (m.topic, m.payload) in self.recently_logged:
                self.stats.redelivered += 1
                if m.ack is not None:
                    acks.append(m.ack)
            else:
                kept.append(m)
        return kept, acks

    def _log_batch(self, batch: list[Message], acks: list[tuple[int, int]]) -> bool:
        """Into the input log, synced, before anything is applied; then acknowledge (MQTT) or release (HTTP).

        False when the log could not take it (a full disk, an I/O error): nothing of it was kept,
        acknowledged or applied, and the fault is held (:class:`HostFaults`) for the retry."""
        if self.log is None:
            return True
        position = self._write_log([("m", (m.channel, m.payload, m.source, m.topic, m.received)) for m in batch])
        if position is None:
            return False
        self.position = position
        self.recently_logged.add_all((m.topic, m.payload) for m in batch if m.source == "mqtt" and m.topic is not None)
        acks = acks + [m.ack for m in batch if m.ack is not None]
        if acks and self._acknowledge is not None:
            try:
                self._acknowledge(acks)
            except Exception:            # the broker will redeliver; seq/t refuses the repeats
                log.exception("acknowledgements not sent (%d)", len(acks))
        for m in batch:
            if m.durable is not None:
                m.durable.set()
        return True

    def _write_log(self, records: list[tuple[str, tuple[Any, ...]]]) -> int | None:
        """Append and sync: the seq of the last record, or None when the log failed (nothing of it kept; the
        fault held for the retry)."""
        assert self.log is not None
        try:
            position = self.log.append(records)
            self.log.sync()
        except OSError as exc:
            self._log_failing = True
            self.faults.failed(FaultPart.INPUT_LOG, exc)
            return None
        if self._log_failing:
            self._log_failing = False
            self.faults.cleared(FaultPart.INPUT_LOG)
        return position

    def reapply(self, batch: list[Message]) -> None:
        """Apply messages from the input log (recovery): not logged again, no dead letters sent again."""
        dead_letter, self._dead_letter = self._dead_letter, None
        try:
            self._process(batch, logged=True)
        finally:
            self._dead_letter = dead_letter

    def _process(self, batch: list[Message], logged: bool = False) -> bool:
        """Log (unless ``logged``: recovery), acknowledge and apply; False when held for the input log."""
        if not logged:
            batch, redelivery_acks = self._skip_redelivered(batch) if self.log is not None else (batch, [])
            if not self._log_batch(batch, redelivery_acks):
                self._held = _Held(batch, redelivery_acks, len(batch))
                return False
        self._apply(batch)
        return True

    def _apply(self, batch: list[Message]) -> None:
        """Apply logged messages: decode, assemble tag samples, update the bank, refuse, publish."""
        started = time.perf_counter()
        columns: dict[str, SampleColumns] = {}
        origins: dict[str, _Origins] = {}      # where each channel's samples came from
        tagged: list[Message] = []
        for message in batch:
            self.stats.messages += 1
            cid = message.channel
            if cid is None and self.tags is not None:
                tagged.append(message)
                continue
            if cid is None or cid not in self.bank:
                self._refuse(message, SampleRefusal.UNKNOWN_CHANNEL, "no channel for this topic or id", None)
                continue
            if cid in self._fed_by_tags:
                self._refuse(message, EngineRefusal.FED_BY_TAGS, f"channel {cid} is assembled from tags", None)
                continue
            decoded = self._decode(message, cid)
            if decoded is None:
                continue
            more, origin = decoded
            if cid in columns:
                origins[cid].add(len(columns[cid]), origin)
                columns[cid].extend(more)
            else:
                columns[cid] = more
                origins[cid] = _Origins(origin)
        if tagged and self.tags is not None:
            self._take_tags(tagged, self.tags.take(tagged), columns, origins)
        urgent = False
        for cid, outcome in self.bank.apply_columns(columns).items():
            self.publisher.touch(cid)   # applied, warm-up or refused: its view changed either way
            self.stats.samples_applied += outcome.applied
            self.stats.samples_warmup += outcome.warmup
            where = origins[cid]
            if outcome.last_applied is not None:
                self.activity.updated_at[cid] = where.locate(outcome.last_applied)[0].received
                self.activity.refused_in_a_row[cid] = 0            # the refusals below, after it, count again
                if self._publish_when is not None:
                    t = columns[cid].t[outcome.last_applied]
                    urgent = self._publish_when(cid, self._clock() if t is None else t) or urgent
            for position, reason in outcome.refused:
                message, index = where.locate(position)
                self._refuse(message, SampleRefusal(reason), f"refused by channel {cid}", index, cid)
            if outcome.last_applied is not None:
                self.activity.refused_in_a_row[cid] = sum(1 for position, _ in outcome.refused
                                                 if position > outcome.last_applied)
        self._take_events()
        self.publisher.flush_if_due(self._queue.empty() or urgent)
        elapsed = time.perf_counter() - started
        self.stats.batches += 1
        self.stats.last_batch_seconds = elapsed
        self.stats.batch_seconds_total += elapsed

    def _take_tags(self, messages: list[Message], taken: TagBatch, columns: dict[str, SampleColumns],
                   origins: dict[str, _Origins]) -> None:
        """Refusals and counts of a batch's tag messages; the samples they formed join ``columns``.

        A channel fed by tags takes no whole samples (:data:`EngineRefusal.FED_BY_TAGS`), so its
        samples never interleave with another lane's and their order is the tag messages' order.
        """
        for i, refusal in taken.refused:
            self._refuse(messages[i], TagRefusal(refusal.reason), refusal.detail, None)
        for i in taken.unknown:
            self._refuse(messages[i], SampleRefusal.UNKNOWN_CHANNEL, "no channel or tag for this topic", None)
        stats = self.stats
        stats.tag_updates_unused += taken.unused
        stats.tag_updates_not_newer += sum(taken.assembled.not_newer.values())
        for cid, counts in taken.assembled.refusals.items():
            held = stats.not_formed.setdefault(cid, {})
            for reason, n in counts.items():
                held[reason] = held.get(reason, 0) + n
        for cid, samples in taken.assembled.samples.items():
            columns[cid] = sample_columns(samples)
            where = _Origins(_Origin(messages[int(samples.position[0])], None))
            for k, position in enumerate(samples.position[1:].tolist(), start=1):
                where.add(k, _Origin(messages[position], None))
            origins[cid] = where

    # ---------------------------------------------------------------- alarms
    def _take_events(self) -> None:
        """Detector events of the last batch (or command) into the alarm book."""
        events = self.bank.take_events()
        if events and self._feed is not None:
            channels = {e.channel for e in events}
            self._feed.take(events, self._clock(), {c: self.bank.baseline_version(c) for c in channels})
