"""The job worker of one server process: claims queued jobs from the database and runs them.

Every process (``sensorledger serve --workers N`` starts N; several machines may share one
PostgreSQL) runs one ``JobRunner``: a thread that claims one job at a time
(``server.jobs.service.claim``), runs its handler and writes a heartbeat every few seconds from a
second thread. It wakes when a job is queued in this process (a session's ``after_commit``) and
otherwise polls every ``poll_s`` seconds, so a job queued by another process starts within about
that time. On shutdown a running job is asked to stop (``JobContext.stopping``); a handler that
stops early gives its job back to the queue, where any process resumes it from the start.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import event
from sqlalchemy.orm import Session, sessionmaker

from server.jobs import service
from server.jobs.models import Job, JobKind

log = logging.getLogger("sensorledger.jobs")
HEARTBEAT_S = 5.0  # a running job's heartbeat at most this far apart


class Stopping(Exception):
    """Raised by a handler that gave up because the server is stopping."""


@dataclass
class JobContext:
    """What a handler gets: its job, sessions, progress and the stop signal."""

    job_id: int
    token: str
    factory: sessionmaker[Session]  # writing sessions
    read_factory: sessionmaker[Session]
    stop: threading.Event = field(default_factory=threading.Event)

    def progress(self, **values: Any) -> None:
        service.progress(self.factory, self.job_id, self.token, **values)

    def hold(self, session: Session) -> Job:
        return service.hold(session, self.job_id, self.token)

    def stopping(self) -> None:
        """Raise ``Stopping`` when the server is shutting down."""
        if self.stop.is_set():
            raise Stopping()


Handler = Callable[[JobContext], None]


def worker_name() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


class JobRunner:
    """Claims and runs jobs of every kind in ``handlers``; one at a time per process."""

    def __init__(
        self,
        factory: sessionmaker[Session],
        read_factory: sessionmaker[Session],
        handlers: Mapping[JobKind, Handler],
        *,
        poll_s: float = 1.0,
        heartbeat_s: float | None = None,
        stale_after_s: float = 60.0,
    ) -> None:
        """``heartbeat_s``: how often a running job's heartbeat is written; by default
        ``min(5, stale_after_s / 4)``, so that a live job never looks stale to another process
        (a job quieter than the stale limit was taken over and run again, then failed)."""
        self._factory = factory
        self._read = read_factory
        self._handlers = dict(handlers)
        self._poll_s = poll_s
        self._heartbeat_s = (
            heartbeat_s if heartbeat_s is not None else min(HEARTBEAT_S, stale_after_s / 4)
        )
        self._stale_after_s = stale_after_s
        self.name = worker_name()
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._idle = threading.Event()
        self._current: JobContext | None = None
        self._threads: list[threading.Thread] = []
        event.listen(factory, "after_commit", self._after_commit)
        event.listen(read_factory, "after_commit", self._after_commit)

    def _after_commit(self, session: Session) -> None:
        if session.info.pop(service.ENQUEUED, False):
            self._wake.set()

    # -- lifecycle -------------------------------------------------------------------------
    def start(self) -> None:
        if self._threads:
            return
        for target, name in ((self._loop, "jobs"), (self._beat_loop, "heartbeat")):
            thread = threading.Thread(target=target, name=f"sensorledger-{name}", daemon=True)
            thread.start()
            self._threads.append(thread)

    def shutdown(self) -> None:
        """Stop claiming; ask a running job to stop (it goes back to the queue) and wait."""
        self._stop.set()
        current = self._current
        if current is not None:
            current.stop.set()
        self._wake.set()
        for thread in self._threads:
            thread.join()
        self._threads = []

    def notify(self) -> None:
        self._wake.set()

    def submit(self, job_id: int) -> None:
        """A job was queued (and committed): look for it now rather than at the next poll."""
        self._wake.set()

    def every(self, seconds: float, chore: Callable[[], object], name: str) -> None:
        """Run ``chore()`` every ``seconds`` until shutdown (e.g. queue the overdue sweep)."""

        def tick() -> None:
            while not self._stop.wait(seconds):
                try:
                    chore()
                    self._wake.set()
                except Exception:
                    log.exception("%s failed", name)

        thread = threading.Thread(target=tick, name=f"sensorledger-{name}", daemon=True)
        thread.start()
        self._threads.append(thread)

    def wait(self, timeout: float | None = 60.0) -> None:
        """Wait until no job is queued or running in the database (tests; a bench). Raises
        ``TimeoutError`` after ``timeout`` seconds."""
        deadline = None if timeout is None else time.monotonic() + timeout
        while True:
            self._wake.set()
            with self._read() as s:
                if service.unfinished(s) == 0:
                    return
            if deadline is not None and time.monotonic() > deadline:
                raise TimeoutError("jobs still queued or running")
            time.sleep(0.05)

    # -- the work --------------------------------------------------------------------------
    def _loop(self) -> None:
        last_recover = 0.0
        while not self._stop.is_set():
            try:
                if time.monotonic() - last_recover >= min(self._stale_after_s / 2, 30.0):
                    service.recover(self._factory, self._stale_after_s)
                    last_recover = time.monotonic()
                claimed = None
                if service.anything_queued(self._read):
                    claimed = service.claim(self._factory, self.name)
            except Exception:
                log.exception("could not claim a job")
                claimed = None
            if claimed is None:
                self._wake.wait(self._poll_s)
                self._wake.clear()
                continue
            self._run(*claimed)

    def _run(self, job_id: int, token: str) -> None:
        ctx = JobContext(job_id, token, self._factory, self._read)
        self._current = ctx
        if self._stop.is_set():
            ctx.stop.set()
        try:
            with self._read() as s:
                kind = service.get_job(s, job_id).kind
            handler = self._handlers.get(kind)
            if handler is None:
                service.fail(self._factory, job_id, token, f"no handler for jobs of kind {kind}")
                return
            handler(ctx)
        except Stopping:
            service.release(self._factory, job_id, token)
        except service.JobLost:
            log.warning("job %s was taken over by another process", job_id)
        except Exception as exc:  # a bug or a lost database: the job says so
            log.exception("job %s failed", job_id)
            try:
                service.fail(
                    self._factory,
                    job_id,
                    token,
                    f"failed, nothing was changed: {type(exc).__name__}: {exc}",
                )
            except Exception:
                log.exception("could not mark job %s failed", job_id)
        finally:
            self._current = None

    def _beat_loop(self) -> None:
        while not self._stop.wait(self._heartbeat_s):
            current = self._current
            if current is None:
                continue
            try:
                service.beat(self._factory, current.job_id, current.token)
            except Exception:
                log.exception("heartbeat of job %s failed", current.job_id)
