"""The input log: ordered, checksummed, reopened where it left off, a torn tail cut, old segments dropped."""

from __future__ import annotations

from pathlib import Path

from service.storage.input_log import InputLog


def _messages(first: int, count: int) -> list[tuple[str, tuple[object, ...]]]:
    return [("m", (f"c{k % 3}", f'{{"y": {k}}}'.encode(), "mqtt", f"plant/c{k % 3}", 1000.0 + k))
            for k in range(first, first + count)]


def test_records_come_back_in_order_after_a_position_and_across_a_reopen(tmp_path: Path) -> None:
    wal = InputLog(tmp_path / "inputs")
    assert wal.append(_messages(0, 5)) == 5
    assert wal.append([("o", ("acknowledge", {"alarm": "c0:drift", "user": "ana", "time": 7.5}))]) == 6
    wal.sync()
    wal.close()
    again = InputLog(tmp_path / "inputs")
    assert again.last_seq == 6
    records = list(again.read_after(3))
    assert [r[0] for r in records] == [4, 5, 6]
    assert records[0] == (4, "m", ("c0", b'{"y": 3}', "mqtt", "plant/c0", 1003.0))
    assert records[-1] == (6, "o", ("acknowledge", {"alarm": "c0:drift", "user": "ana", "time": 7.5}))
    assert again.append(_messages(5, 1)) == 7
    again.close()


def test_a_torn_tail_is_cut_at_the_last_whole_record(tmp_path: Path) -> None:
    wal = InputLog(tmp_path / "inputs")
    wal.append(_messages(0, 10))
    wal.close()
    segment = next((tmp_path / "inputs").iterdir())
    data = segment.read_bytes()
    segment.write_bytes(data[:-7])                     # a crash in the middle of the last record
    again = InputLog(tmp_path / "inputs")
    assert again.last_seq == 9
    assert [r[0] for r in again.read_after(0)] == list(range(1, 10))
    corrupt = bytearray(segment.read_bytes())
    corrupt[len(corrupt) // 2] ^= 0xFF                 # a flipped byte: the checksum stops the reading there
    segment.write_bytes(bytes(corrupt))
    third = InputLog(tmp_path / "inputs")
    assert 0 < third.last_seq < 9
    assert [r[0] for r in third.read_after(0)] == list(range(1, third.last_seq + 1))


def test_segments_wholly_before_a_checkpoint_are_deleted(tmp_path: Path) -> None:
    wal = InputLog(tmp_path / "inputs", segment_bytes=200)
    for k in range(10):
        wal.append(_messages(k * 3, 3))
    wal.sync()
    segments = sorted((tmp_path / "inputs").iterdir())
    assert len(segments) > 3
    wal.start_new_segment()
    assert wal.discard_through(18) >= 2
    assert [r[0] for r in wal.read_after(18)] == list(range(19, 31))
    assert min(r[0] for r in wal.read_after(0)) <= 19            # nothing after the position was dropped
    wal.close()
