"""The store: checkpoints, the alarm journal and the downsampled history, in SQLite or PostgreSQL.

SQLAlchemy Core gives one interface and one set of table definitions for
both: SQLite (the default, a file in the data directory, WAL journal mode,
``synchronous=FULL`` so a commit survives a power cut) and PostgreSQL (a
``postgresql://`` URL, for shared deployments). Core, not the ORM: the rows
are few and simple, and each write is one explicit transaction.

* ``rwls_checkpoints``: the engine's whole state as one checksummed blob, with
  the input-log position it covers; a checkpoint, the journal entries made
  since the last one and the history rows go in one transaction, and the two
  newest are kept (the older is the fallback when the newest fails its check).
* ``rwls_journal``: the alarm journal, append-only (``seq`` is the key, so an
  entry can never be written twice).
* ``rwls_history``: per channel, parameters, sigma and detector statistics
  every ``history_step`` seconds, pruned after ``history_retention``.
* ``rwls_meta``: ``schema_version``; :meth:`Store.migrate` brings an older
  store up to :data:`SCHEMA_VERSION`, step by step.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import (
    BigInteger,
    Column,
    Float,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Table,
    Text,
    create_engine,
    delete,
    event,
    func,
    insert,
    select,
    text,
    update,
)
from sqlalchemy.engine import Connection, Engine

__all__ = ["SCHEMA_VERSION", "Checkpoint", "Store", "StoreError", "store_url"]

log = logging.getLogger(__name__)

SCHEMA_VERSION = 1
KEEP_CHECKPOINTS = 2

metadata = MetaData()
meta_table = Table("rwls_meta", metadata, Column("key", String(64), primary_key=True),
                   Column("value", Text, nullable=False))
checkpoints = Table("rwls_checkpoints", metadata,
                    Column("id", Integer, primary_key=True, autoincrement=True),
                    Column("created_at", Float, nullable=False),
                    Column("position", BigInteger, nullable=False),       # input-log seq it covers
                    Column("size", BigInteger, nullable=False),
                    Column("checksum", String(64), nullable=False),       # sha256 of body
                    Column("body", LargeBinary, nullable=False))
journal = Table("rwls_journal", metadata,
                Column("seq", BigInteger, primary_key=True, autoincrement=False),
                Column("time", Float, nullable=False),
                Column("alarm", String(300), nullable=False),
                Column("channel", String(160), nullable=False),
                Column("body", Text, nullable=False))                     # the entry as JSON
Index("rwls_journal_channel", journal.c.channel, journal.c.seq)
history = Table("rwls_history", metadata,
                Column("id", Integer, primary_key=True, autoincrement=True),
                Column("channel", String(160), nullable=False),
                Column("time", Float, nullable=False),                     # sample time (else wall clock)
                Column("body", Text, nullable=False))
Index("rwls_history_channel_time", history.c.channel, history.c.time)

# Schema migrations, one per version after the first: (version it makes, function).
MIGRATIONS: list[tuple[int, Any]] = []


class StoreError(RuntimeError):
    """The store cannot be used (unreachable, or a schema newer than this program)."""


@dataclass(frozen=True)
class Checkpoint:
    id: int
    created_at: float
    position: int
    body: bytes


def store_url(path_or_url: str) -> str:
    """``store.path`` (a directory: SQLite inside) or ``store.url`` as an SQLAlchemy URL."""
    if "://" in path_or_url:
        if path_or_url.startswith("postgresql://"):
            return "postgresql+psycopg://" + path_or_url[len("postgresql://"):]
        return path_or_url
    directory = Path(path_or_url)
    directory.mkdir(parents=True, exist_ok=True)
    return f"sqlite:///{directory / 'rwls.sqlite3'}"


class Store:
    """One store (SQLite or PostgreSQL), safe to use from several threads (a connection pool each)."""

    def __init__(self, url: str, schema: str = "") -> None:
        self.url = url
        self.is_sqlite = url.startswith("sqlite")
        # A PostgreSQL schema of its own (one per replica of a fleet): every connection searches it first.
        connect_args = {"options": f"-csearch_path={schema}"} if schema and not self.is_sqlite else {}
        try:
            self.engine: Engine = create_engine(url, future=True, pool_pre_ping=not self.is_sqlite,
                                                connect_args=connect_args)
        except Exception as exc:             # a bad URL, a missing driver
            raise StoreError(f"cannot open the store: {type(exc).__name__}") from None
        if self.is_sqlite:
            event.listen(self.engine, "connect", _sqlite_pragmas)
        elif schema:
            try:
                with self.engine.begin() as conn:
                    conn.execute(text(f'CREATE SCHEMA IF NOT EXISTS "{schema}"'))   # a checked identifier
            except Exception as exc:
                self.engine.dispose()
                raise StoreError(f"cannot create the store's schema {schema}: {type(exc).__name__}") from None
        try:
            self.migrate()
        except StoreError:
            self.engine.dispose()
            raise

    def close(self) -> None:
        self.engine.dispose()

    # ------------------------------------------------------------------ schema
    def migrate(self) -> int:
        """Create the tables of a new store, or bring an older one up to date; returns the version."""
        try:
            with self.engine.begin() as conn:
                metadata.create_all(conn, tables=[meta_table])
                row = conn.execute(select(meta_table.c.value).where(meta_table.c.key == "schema_version")).first()
                version = int(row[0]) if row else 0
                if version > SCHEMA_VERSION:
                    raise StoreError(f"the store's schema is version {version}, newer than this program's "
                                     f"{SCHEMA_VERSION}: upgrade rwls")
                if version == 0:
                    metadata.create_all(conn)
                    conn.execute(insert(meta_table).values(key="schema_version", value=str(SCHEMA_VERSION)))
                    return SCHEMA_VERSION
                for target, step in MIGRATIONS:
                    if target > version:
                        step(conn)
                        conn.execute(update(meta_table).where(meta_table.c.key == "schema_version")
                                     .values(value=str(target)))
                        version = target
                return version
        except StoreError:
            raise
        except Exception as exc:
            raise StoreError(f"cannot open the store: {type(exc).__name__}: {str(exc)[:200]}") from None

    # ------------------------------------------------------------- checkpoints
    def save(self, body: bytes, position: int, entries: Sequence[dict[str, Any]] = (),
             history_rows: Sequence[tuple[str, float, dict[str, Any]]] = ()) -> int:
        """A checkpoint, the journal entries since the last one and history rows, in one transaction."""
        digest = hashlib.sha256(body).hexdigest()
        with self.engine.begin() as conn:
            result = conn.execute(insert(checkpoints).values(created_at=time.time(), position=position,
                                                             size=len(body), checksum=digest, body=body))
            key = result.inserted_primary_key
            if key is None:
                raise RuntimeError("the store gave the new checkpoint no id")
            new_id = int(key[0])
            _add_journal(conn, entries)
            _add_history(conn, history_rows)
            keep = select(checkpoints.c.id).order_by(checkpoints.c.id.desc()).limit(KEEP_CHECKPOINTS)
            conn.execute(delete(checkpoints).where(checkpoints.c.id.not_in(keep.scalar_subquery())))
        return new_id

    def checkpoints(self) -> list[Checkpoint]:
        """The checkpoints that pass their checksum, newest first (a torn or altered one is skipped)."""
        good = []
        with self.engine.connect() as conn:
            rows = conn.execute(select(checkpoints).order_by(checkpoints.c.id.desc())).all()
        for row in rows:
            body = bytes(row.body)
            if len(body) != row.size or hashlib.sha256(body).hexdigest() != row.checksum:
                log.warning("checkpoint %d fails its checksum: skipped", row.id)
                continue
            good.append(Checkpoint(row.id, row.created_at, row.position, body))
        return good

    def latest_checkpoint_time(self) -> float | None:
        with self.engine.connect() as conn:
            return conn.execute(select(func.max(checkpoints.c.created_at))).scalar()

    # ----------------------------------------------------------------- journal
    def add_journal(self, entries: Sequence[dict[str, Any]]) -> None:
        with self.engine.begin() as conn:
            _add_journal(conn, entries)

    def journal(self, after: int = 0, limit: int = 100, channel: str | None = None) -> list[dict[str, Any]]:
        query = select(journal.c.body).where(journal.c.seq > after)
        if channel is not None:
            query = query.where(journal.c.channel == channel)
        with self.engine.connect() as conn:
            rows = conn.execute(query.order_by(journal.c.seq).limit(limit)).all()
        return [json.loads(r[0]) for r in rows]

    def last_journal_seq(self) -> int:
        with self.engine.connect() as conn:
            return int(conn.execute(select(func.max(journal.c.seq))).scalar() or 0)

    # ----------------------------------------------------------------- history
    def history(self, channel: str, since: float | None = None, until: float | None = None,
                limit: int = 1000) -> list[dict[str, Any]]:
        query = select(history.c.time, history.c.body).where(history.c.channel == channel)
        if since is not None:
            query = query.where(history.c.time >= since)
        if until is not None:
            query = query.where(history.c.time <= until)
        with self.engine.connect() as conn:
            rows = conn.execute(query.order_by(history.c.time.desc()).limit(limit)).all()
        return [{"t": t, **json.loads(body)} for t, body in reversed(rows)]

    def save_history(self, rows: Sequence[tuple[str, float, dict[str, Any]]]) -> None:
        with self.engine.begin() as conn:
            _add_history(conn, rows)

    def prune_history(self, before: float) -> int:
        with self.engine.begin() as conn:
            return int(conn.execute(delete(history).where(history.c.time < before)).rowcount or 0)


def _add_journal(conn: Connection, entries: Iterable[dict[str, Any]]) -> None:
    rows = [{"seq": e["seq"], "time": e["time"], "alarm": e["alarm"], "channel": e["channel"],
             "body": json.dumps(e)} for e in entries]
    if rows:
        conn.execute(insert(journal), rows)


def _add_history(conn: Connection, rows: Iterable[tuple[str, float, dict[str, Any]]]) -> None:
    values = [{"channel": c, "time": t, "body": json.dumps(body)} for c, t, body in rows]
    if values:
        conn.execute(insert(history), values)


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA synchronous=FULL")      # a committed checkpoint survives a power cut
    cursor.execute("PRAGMA busy_timeout=5000")
    cursor.close()
