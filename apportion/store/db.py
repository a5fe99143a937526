"""Engines and sessions. SQLite gets WAL, foreign keys and a busy timeout; write transactions on
SQLite start with BEGIN IMMEDIATE so that two writers queue instead of failing half-way.

LOCK ORDER (the one order for the whole service; DEVELOPERS.md repeats it). On PostgreSQL a write
transaction takes row locks in this order and never the reverse, skipping the levels it does not
need, so two transactions can never wait on each other in a cycle (SQLite serializes all writers
with BEGIN IMMEDIATE, so the order costs nothing there):

1. the experiment row (`experiments`, `get_experiment(lock=True)`): readout uploads and fit
   starts. It serializes the numbering of readouts and models and the content-hash check.
2. the plan pointer row (`plan_pointers`, `ensure_pointer` / `pointer(lock=True)`): every change
   to a plan: drafts, approvals and rejections, activations, rollbacks, the auto-rollback setting,
   watch uploads and the report job. It serializes plan version numbers, the live pointer and watch
   upload numbers.
3. job rows (`jobs`): claim (SKIP LOCKED), heartbeat, finish, fail, reclaim.
4. the rows the transaction changes, reached through the lock above (plan versions, cohort models,
   readouts, watch uploads, keys) and content-addressed blobs (`insert_or_ignore`, which waits
   for a concurrent insert of the same key). Several rows of one table are taken in key order.
5. the audit chain head (`audit_head`), always last: `audit.append` queues the entry and the
   chain is extended just before the commit (store/audit.py), whatever order the code appends in.

Numbers ("last + 1") are computed only while holding the lock of level 1 or 2 that owns them, and
every unique key has its lock, so a concurrent request waits instead of colliding.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import CursorResult, Engine, Result, create_engine, event, func, select
from sqlalchemy.dialects.postgresql import insert as pg_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlalchemy.orm import Session, sessionmaker

from apportion.store.blobstore import BlobStore


def utcnow() -> str:
    """ISO-8601 UTC timestamp with microseconds: the one time format of the store."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def next_number(session: Session, column: Any, *where: Any) -> int:
    """`max(column) + 1` over the rows matching `where` (1 when there are none): the "last + 1"
    numbers of readouts, models, comparisons, plan versions and watch uploads. Call it only while
    holding the lock of level 1 or 2 that owns the number (LOCK ORDER above)."""
    last = session.execute(select(func.max(column)).where(*where)).scalar()
    return int(last or 0) + 1


def _finite(value: Any) -> Any:
    """JSON has no NaN or infinity: store them as null (PostgreSQL rejects them outright)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


def json_dumps(value: Any) -> str:
    return json.dumps(_finite(value), allow_nan=False, default=str)


def is_sqlite(url: str) -> bool:
    return url.startswith("sqlite")


def make_engine(url: str, *, pool_size: int = 40) -> Engine:
    if is_sqlite(url):
        path = url.split("///", 1)[-1]
        if path and path != ":memory:":
            os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
        engine = create_engine(
            url,
            connect_args={"check_same_thread": False, "timeout": 30},
            json_serializer=json_dumps,
        )

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record):  # type: ignore[no-untyped-def]
            dbapi_conn.isolation_level = None  # let the begin hook below issue BEGIN
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA busy_timeout=30000")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.close()

        @event.listens_for(engine, "begin")
        def _on_begin(conn):  # type: ignore[no-untyped-def]
            mode = conn.get_execution_options().get("sqlite_begin", "DEFERRED")
            conn.exec_driver_sql(f"BEGIN {mode}")

        return engine
    if url.startswith("postgresql://"):
        url = "postgresql+psycopg://" + url[len("postgresql://") :]
    return create_engine(
        url, pool_size=pool_size, max_overflow=10, pool_pre_ping=True, json_serializer=json_dumps
    )


@dataclass
class Database:
    """The engine plus two session factories: reads, and writes (IMMEDIATE on SQLite), and the blob
    store where the bytes of blobs live (reached from a session as `session.info["blobs"]`)."""

    url: str
    engine: Engine
    blobs: BlobStore | None = None

    def __post_init__(self) -> None:
        info = {"blobs": self.blobs}
        self._read = sessionmaker(bind=self.engine, expire_on_commit=False, info=info)
        write_bind = (
            self.engine.execution_options(sqlite_begin="IMMEDIATE")
            if is_sqlite(self.url)
            else self.engine
        )
        self._write = sessionmaker(bind=write_bind, expire_on_commit=False, info=info)

    @classmethod
    def connect(cls, url: str, *, pool_size: int = 40, blob_uri: str = "./var/blobs") -> Database:
        return cls(url=url, engine=make_engine(url, pool_size=pool_size), blobs=BlobStore(blob_uri))

    @contextmanager
    def read(self) -> Iterator[Session]:
        with self._read() as session, session.begin():
            yield session

    @contextmanager
    def write(self) -> Iterator[Session]:
        """One transaction: commits on success, rolls back on any exception."""
        with self._write() as session, session.begin():
            yield session

    def dispose(self) -> None:
        self.engine.dispose()


def insert_or_ignore(session: Session, table: Any, values: dict[str, Any]) -> bool:
    """INSERT ... ON CONFLICT DO NOTHING: a row that a concurrent transaction inserts with the same
    key is left to it (PostgreSQL waits for that transaction, then skips). True when this call
    inserted the row."""
    dialect = session.get_bind().dialect.name
    make = pg_insert if dialect == "postgresql" else sqlite_insert
    stmt = make(table).values(**values).on_conflict_do_nothing()
    return bool(rowcount(session.execute(stmt)))


def rowcount(result: Result[Any]) -> int:
    """Rows an INSERT, UPDATE or DELETE touched: `Session.execute` types its answer as a plain
    Result, while DML statements return a CursorResult, which carries the count."""
    assert isinstance(result, CursorResult)
    return result.rowcount


def ping(db: Database) -> bool:
    """True when the database answers a trivial query."""
    from sqlalchemy import text

    try:
        with db.engine.connect() as conn:
            conn.execute(text("SELECT 1"))
        return True
    except Exception:
        return False
