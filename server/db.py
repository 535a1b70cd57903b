"""Engine, session and the declarative base (naming convention for SQLite and PostgreSQL alike)."""

from __future__ import annotations

import math
import sqlite3
import threading
from collections import deque
from collections.abc import Iterator
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Annotated, Any

import numpy as np
from fastapi import Depends, Request
from fastapi import Path as PathParam
from sqlalchemy import Connection, DateTime, Engine, MetaData, create_engine, event
from sqlalchemy.engine import Dialect, make_url
from sqlalchemy.orm import DeclarativeBase, Session, sessionmaker
from sqlalchemy.types import TypeDecorator

NAMING = {
    "pk": "pk_%(table_name)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "ix": "ix_%(column_0_label)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


class UTCDateTime(TypeDecorator[datetime]):
    """Timezone-aware UTC datetimes on every backend (SQLite keeps no offset)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column")
        value = value.astimezone(UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def utcnow() -> datetime:
    return datetime.now(UTC)


def json_safe(x: Any) -> Any:
    """A value for a JSON column, recursively: numpy arrays and scalars to Python, non-finite
    floats to None (PostgreSQL's JSON has no NaN), dates and datetimes to ISO text. String
    enums stay as they are (they are strings)."""
    if isinstance(x, dict):
        return {str(k): json_safe(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [json_safe(v) for v in x]
    if isinstance(x, np.ndarray):
        return [json_safe(v) for v in x.tolist()]
    if isinstance(x, np.bool_ | bool):
        return bool(x)
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, float | np.floating):
        return float(x) if math.isfinite(x) else None
    if isinstance(x, datetime | date):
        return x.isoformat()
    return x


WRITE = "sensorledger_write"  # execution option: this connection's transactions will write
DEFAULT_BUSY_TIMEOUT_MS = 30_000


def make_engine(url: str, *, busy_timeout_ms: int = DEFAULT_BUSY_TIMEOUT_MS) -> Engine:
    """An engine for ``url``; SQLite files get WAL, a busy timeout and enforced foreign keys.

    SQLite transactions are begun by us, not by the driver: ``BEGIN IMMEDIATE`` on connections
    carrying the ``WRITE`` execution option (see ``writer``), a plain deferred ``BEGIN`` on the
    others. A writer thus takes the database's single write lock before its first read and waits
    for it up to the busy timeout, instead of reading first and failing at its first write with
    "database is locked" (SQLite cannot wait there: another writer may have changed what was
    read). Readers in WAL mode never wait."""
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite":
        return create_engine(url, pool_pre_ping=True, pool_size=10, max_overflow=20)
    if parsed.database and parsed.database != ":memory:":
        Path(parsed.database).parent.mkdir(parents=True, exist_ok=True)
    engine = create_engine(
        url,
        connect_args={"check_same_thread": False, "timeout": busy_timeout_ms / 1000},
        pool_size=10,
        max_overflow=30,
    )

    @event.listens_for(engine, "connect")
    def _pragmas(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None  # the driver issues no BEGIN of its own; see _begin
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.close()

    turns = WriterQueue()  # this process's writers, in the order they asked
    wait_s = busy_timeout_ms / 1000

    @event.listens_for(engine, "begin")
    def _begin(conn: Connection) -> None:
        if not conn.get_execution_options().get(WRITE, False):
            conn.exec_driver_sql("BEGIN")
            return
        if not turns.acquire(wait_s):
            raise sqlite3.OperationalError("database is locked (this process's writers queued)")
        conn.info[HOLDS_TURN] = True
        try:
            conn.exec_driver_sql("BEGIN IMMEDIATE")
        except BaseException:
            _end(conn)
            raise

    @event.listens_for(engine, "commit")
    @event.listens_for(engine, "rollback")
    def _end(conn: Connection) -> None:
        if conn.info.pop(HOLDS_TURN, False):
            turns.release()

    @event.listens_for(engine.pool, "checkin")
    def _returned(_dbapi_conn: Any, record: Any) -> None:  # a transaction never ended
        if record is not None and record.info.pop(HOLDS_TURN, False):
            turns.release()

    return engine


HOLDS_TURN = "sensorledger_holds_write_turn"  # Connection.info: this connection has the turn


class WriterQueue:
    """First come, first served among one process's SQLite writers.

    SQLite's busy handler makes a writer waiting for the write lock sleep and try again (up to
    100 ms apart), so under steady contention the lock goes to whoever tries at the right moment,
    not to who waited longest: with 16 writers some waited out the whole busy timeout and
    failed with "database is locked" (a 500). Writers of one process therefore queue here, in
    order, before BEGIN IMMEDIATE; only the one at the front competes for SQLite's lock (with
    other processes, if any). ``acquire`` waits at most ``timeout`` seconds."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._held = False
        self._waiting: deque[threading.Event] = deque()

    def acquire(self, timeout: float) -> bool:
        with self._lock:
            if not self._held and not self._waiting:
                self._held = True
                return True
            turn = threading.Event()
            self._waiting.append(turn)
        if turn.wait(timeout):
            return True
        with self._lock:
            if turn.is_set():  # handed over as the wait ran out
                return True
            self._waiting.remove(turn)
            return False

    def release(self) -> None:
        """Hand the turn to the next writer in line (it stays held), or free it."""
        with self._lock:
            if self._waiting:
                self._waiting.popleft().set()
            else:
                self._held = False


def writer(engine: Engine) -> Engine:
    """``engine`` for transactions that write: SQLite takes the write lock at BEGIN (waiting for
    it up to the busy timeout); other databases are unchanged (row locks do the work there)."""
    return engine.execution_options(**{WRITE: True})


def make_sessionmaker(engine: Engine, *, read_only: bool = False) -> sessionmaker[Session]:
    """Sessions that may write (the default: SQLite takes the write lock at BEGIN), or with
    ``read_only`` sessions that only read (never wait in WAL mode; a write in them may fail
    with "database is locked" under contention)."""
    return sessionmaker(engine if read_only else writer(engine), expire_on_commit=False)


READ_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


def get_session(request: Request) -> Iterator[Session]:
    """One session per request; the route commits, this only closes (rolling back the rest).
    A request that may write (any method but GET, HEAD, OPTIONS) gets a writing session."""
    state = request.app.state
    factory = state.read_sessionmaker if request.method in READ_METHODS else state.sessionmaker
    with factory() as session:
        yield session


SessionDep = Annotated[Session, Depends(get_session)]

ID_MAX = 2**31 - 1  # PostgreSQL's integer; a larger id in a URL is a 422, never a 500
RowId = Annotated[int, PathParam(ge=1, le=ID_MAX)]  # an id in a path: /jobs/{job_id}
