"""SQLite writers of one process take the write lock in the order they asked for it.

SQLite's own busy handler polls (a waiting writer sleeps up to 100 ms between tries), so under
steady contention the lock goes to whoever tries at the right moment: with 16 API writers some
waited out the whole 30 s busy timeout and answered 500 "database is locked" (found by
tests/reliability in a 60 s run). ``server.db.WriterQueue`` serves them first come, first served.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable

import sqlalchemy as sa

from server.db import WriterQueue, make_engine, make_sessionmaker

GAP_S = 0.15  # between two writers' arrivals: their order is unambiguous


def _arrive_in_order(n: int, start: Callable[[int], None]) -> list[threading.Thread]:
    threads = []
    for i in range(n):
        t = threading.Thread(target=start, args=(i,))
        t.start()
        threads.append(t)
        time.sleep(GAP_S)
    return threads


def test_the_queue_serves_in_arrival_order() -> None:
    queue = WriterQueue()
    assert queue.acquire(1.0)
    order: list[int] = []

    def writer(i: int) -> None:
        assert queue.acquire(10.0)
        order.append(i)
        queue.release()

    threads = _arrive_in_order(5, writer)
    queue.release()
    for t in threads:
        t.join()
    assert order == [0, 1, 2, 3, 4]


def test_a_writer_that_waited_too_long_leaves_the_queue() -> None:
    queue = WriterQueue()
    assert queue.acquire(1.0)
    assert not queue.acquire(0.05)  # gave up: not left in line to block the others
    queue.release()
    assert queue.acquire(0.05)
    queue.release()


def test_sqlite_writers_get_the_lock_in_arrival_order(tmp_path) -> None:
    engine = make_engine(f"sqlite:///{tmp_path / 'w.db'}", busy_timeout_ms=30_000)
    factory = make_sessionmaker(engine)
    with factory() as s:
        s.execute(sa.text("CREATE TABLE t (i INTEGER)"))
        s.commit()
    order: list[int] = []

    def writer(i: int) -> None:
        with factory() as s:
            s.execute(sa.text("INSERT INTO t (i) VALUES (:i)"), {"i": i})
            order.append(i)
            s.commit()

    first = factory()
    first.execute(sa.text("INSERT INTO t (i) VALUES (-1)"))  # holds the write lock
    threads = _arrive_in_order(6, writer)
    first.commit()
    first.close()
    for t in threads:
        t.join()
    with factory() as s:
        stored = list(s.scalars(sa.text("SELECT i FROM t ORDER BY rowid")))
    engine.dispose()
    assert order == list(range(6))
    assert stored == [-1, *range(6)]
