"""The store against SQLite and a real PostgreSQL on 127.0.0.1: schema, checkpoints, journal, history."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import update
from sqlalchemy.exc import IntegrityError

from service.storage.store import SCHEMA_VERSION, Store, StoreError, checkpoints, meta_table, store_url

pytestmark = pytest.mark.integration


@pytest.fixture(params=["sqlite", "postgresql"])
def store(request: pytest.FixtureRequest, tmp_path: Path) -> Store:
    if request.param == "sqlite":
        made = Store(store_url(str(tmp_path / "data")))
    else:
        made = Store(store_url(request.getfixturevalue("postgres_url")))
    request.addfinalizer(made.close)
    return made


def _entry(seq: int, channel: str = "flow") -> dict[str, object]:
    return {"seq": seq, "time": 100.0 + seq, "alarm": f"{channel}:drift", "channel": channel, "kind": "drift",
            "action": "condition_on", "before": "Normal", "after": "Unacknowledged", "evidence": {}}


def test_checkpoints_keep_the_newest_two_with_their_journal_and_history(store: Store) -> None:
    for k in range(1, 5):
        store.save(bytes([k]) * (1000 * k), position=10 * k, entries=[_entry(k)],
                   history_rows=[("flow", 50.0 + k, {"parameters": [k, 2 * k]})])
    found = store.checkpoints()
    assert [c.position for c in found] == [40, 30]
    assert found[0].body == bytes([4]) * 4000
    assert [e["seq"] for e in store.journal()] == [1, 2, 3, 4]
    assert store.last_journal_seq() == 4
    assert [e["seq"] for e in store.journal(after=2, limit=1)] == [3]
    assert [h["parameters"] for h in store.history("flow", since=52.0)] == [[2, 4], [3, 6], [4, 8]]
    assert store.prune_history(before=53.0) == 2
    assert [h["t"] for h in store.history("flow")] == [53.0, 54.0]


def test_a_journal_entry_can_never_be_written_twice(store: Store) -> None:
    store.add_journal([_entry(1)])
    with pytest.raises(IntegrityError):
        store.add_journal([_entry(1)])


def test_a_torn_checkpoint_is_skipped_for_the_one_before(store: Store) -> None:
    store.save(b"good" * 100, position=5)
    store.save(b"newer" * 100, position=9)
    with store.engine.begin() as conn:          # the newest loses its tail, as a torn write would leave it
        newest = max(c.id for c in store.checkpoints())
        conn.execute(update(checkpoints).where(checkpoints.c.id == newest).values(body=b"newer" * 50))
    assert [c.position for c in store.checkpoints()] == [5]


def test_schema_is_versioned_and_a_newer_one_is_refused(store: Store) -> None:
    assert store.migrate() == SCHEMA_VERSION
    with store.engine.begin() as conn:
        conn.execute(update(meta_table).where(meta_table.c.key == "schema_version").values(value="99"))
    with pytest.raises(StoreError, match="newer than this program"):
        Store(store.url)


def test_an_unreachable_server_is_a_clear_error() -> None:
    with pytest.raises(StoreError, match="cannot open the store"):
        Store("postgresql+psycopg://nobody@127.0.0.1:1/none?connect_timeout=1")
