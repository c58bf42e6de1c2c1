"""The engine's intake: lists in, lists out, bounded, in order, commands kept in their place."""

from __future__ import annotations

import concurrent.futures
import queue
import threading

import pytest

from service.broker_link.messages import Message
from service.engine.intake import Command, Intake
from service.engine.operations import Inspect


def _messages(n: int, start: int = 0) -> list[Message]:
    return [Message("c", str(k).encode(), "mqtt") for k in range(start, start + n)]


def _command() -> Command:
    return Command(Inspect(lambda engine: None), concurrent.futures.Future())


def test_messages_come_out_in_order_and_a_command_stops_a_take_in_its_place() -> None:
    intake = Intake(maxsize=100)
    first, second = _messages(3), _messages(2, 3)
    command = _command()
    assert intake.offer_all(first) == 3
    intake.put(command)
    assert intake.offer_all(second) == 2
    intake.put(None)                                   # a wake-up between them: taken and finished
    taken, stop = intake.take_messages(10)
    assert (taken, stop) == (first, command)
    taken, stop = intake.take_messages(10)
    assert (taken, stop) == (second, None)
    assert intake.empty() and intake.unfinished_tasks == 6     # 5 messages and the command, not the wake-up
    intake.task_done(6)
    assert intake.unfinished_tasks == 0
    with pytest.raises(ValueError, match="more times"):
        intake.task_done()


def test_a_take_stops_at_its_limit() -> None:
    intake = Intake(maxsize=100)
    intake.offer_all(_messages(10))
    taken, _ = intake.take_messages(4)
    assert [m.payload for m in taken] == [b"0", b"1", b"2", b"3"]
    assert intake.qsize() == 6


def test_a_full_intake_takes_what_fits_and_waits_for_room_for_the_rest() -> None:
    intake = Intake(maxsize=4)
    messages = _messages(10)
    assert intake.offer_all(messages, timeout=0.0) == 4           # no waiting: the first four
    done: list[int] = []
    producer = threading.Thread(target=lambda: done.append(intake.offer_all(messages[4:], timeout=10.0)))
    producer.start()
    out: list[Message] = []
    for _ in range(1000):                                         # bounded: 10 messages in lists of <= 4
        taken, _ = intake.take_messages(4, timeout=0.5)
        out += taken
        if len(out) == 10:
            break
    producer.join(10.0)
    assert done == [6] and out == messages
    with pytest.raises(queue.Full):
        intake.offer_all(_messages(4))
        intake.put(None, timeout=0.0)


def test_an_empty_take_waits_at_most_its_timeout_and_a_get_raises_empty() -> None:
    intake = Intake(maxsize=2)
    assert intake.take_messages(5, timeout=0.01) == ([], None)
    with pytest.raises(queue.Empty):
        intake.get(timeout=0.01)
    with pytest.raises(ValueError, match="maxsize"):
        Intake(maxsize=0)
