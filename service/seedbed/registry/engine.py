"""Connections to the registry database: one SQLAlchemy engine per process.

SQLite needs two corrections to be a safe shared store for several threads and processes:
- Python's sqlite3 module opens transactions lazily and only before data changes, so a
  read-then-write could interleave with another writer. We take over transaction control and
  start writing transactions with BEGIN IMMEDIATE (the write lock is taken up front, and a busy
  database is waited for instead of failing half-way), reading ones with a plain BEGIN.
- WAL journal (readers never block the writer) with synchronous=FULL: a commit is on disk
  before we acknowledge a publish, so even a power loss keeps every 201 that was sent.
  Publishes are rare; the extra fsync per commit costs nothing that matters.
"""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import Connection, Engine, create_engine, event
from sqlalchemy.engine import make_url

from seedbed.registry.config import RegistryConfig

# How long a writer waits for SQLite's write lock before giving up (milliseconds).
SQLITE_BUSY_MS = 30_000
# A replica must notice an unreachable PostgreSQL quickly (readiness, a request's error).
PG_CONNECT_TIMEOUT_S = 5
_WRITE_OPTION = "seedbed_write"


def _use_wal(cursor: Any) -> None:
    """Switch the file to WAL (a persistent property of the file, so usually already done).

    Switching takes an exclusive lock and SQLite does not run its busy handler for it: several
    processes opening a new file at once would see "database is locked". Retry instead.
    """
    deadline = time.monotonic() + SQLITE_BUSY_MS / 1000
    while True:
        if str(cursor.execute("PRAGMA journal_mode").fetchone()[0]).lower() == "wal":
            return
        try:
            cursor.execute("PRAGMA journal_mode = WAL")
        except sqlite3.OperationalError as exc:
            if "locked" not in str(exc) or time.monotonic() > deadline:
                raise
            time.sleep(0.01)


def _sqlite_engine(url: str, pool_size: int) -> Engine:
    path = make_url(url).database
    if path:
        # Created on first start; only the service's user may read the keys' hashes.
        Path(path).parent.mkdir(parents=True, exist_ok=True, mode=0o700)
    engine = create_engine(
        url,
        connect_args={"timeout": SQLITE_BUSY_MS / 1000, "check_same_thread": False},
        pool_size=pool_size,
        max_overflow=pool_size,
    )

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        dbapi_connection.isolation_level = None  # we issue BEGIN ourselves
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute(f"PRAGMA busy_timeout = {SQLITE_BUSY_MS}")
            _use_wal(cursor)
            cursor.execute("PRAGMA synchronous = FULL")
            cursor.execute("PRAGMA foreign_keys = ON")
        finally:
            cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        writing = conn.get_execution_options().get(_WRITE_OPTION, False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if writing else "BEGIN")

    return engine


def _postgres_engine(url: str, pool_size: int) -> Engine:
    return create_engine(
        url,
        # A replica outlives database restarts and fail-overs: test a pooled connection before
        # use instead of failing the request that happens to get a dead one.
        pool_pre_ping=True,
        pool_size=pool_size,
        max_overflow=pool_size,
        pool_recycle=1800,
        connect_args={"connect_timeout": PG_CONNECT_TIMEOUT_S, "application_name": "seedbed"},
    )


def open_engine(config: RegistryConfig, pool_size: int = 5) -> Engine:
    """An engine for the configured database; nothing is connected until first use."""
    if config.backend == "sqlite":
        return _sqlite_engine(config.database_url, pool_size)
    return _postgres_engine(config.database_url, pool_size)


@contextmanager
def writing(engine: Engine) -> Iterator[Connection]:
    """A transaction that will write: committed when the block ends, rolled back on error."""
    with engine.connect() as conn:
        conn.execution_options(**{_WRITE_OPTION: True})
        with conn.begin():
            yield conn


@contextmanager
def reading(engine: Engine) -> Iterator[Connection]:
    """A read-only transaction (a consistent snapshot on both backends)."""
    with engine.connect() as conn, conn.begin():
        yield conn


def is_postgres(conn: Connection) -> bool:
    return conn.dialect.name == "postgresql"
