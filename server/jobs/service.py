"""Queue, claim and finish jobs safely from any number of server processes.

- ``enqueue`` adds a job; ``enqueue_once`` adds one unless the same work is already queued
  (a unique ``coalesce_key``: INSERT ... ON CONFLICT DO UPDATE, which also row-locks the queued
  job until the caller commits, so a claimer cannot take it before the change that asked for it
  is visible).
- ``claim`` takes the oldest queued job whose sensor type has no running job (one job per type at
  a time: a fleet comparison never overlaps a refit of the same type). On PostgreSQL the claim is
  ``SELECT ... FOR UPDATE SKIP LOCKED`` under a transaction-scoped advisory lock (claims are
  serialised, so two claimers cannot both see a type as idle); on SQLite the claim transaction
  holds the database's write lock (BEGIN IMMEDIATE), so there is one claimer at a time.
- A claimer writes ``heartbeat_at`` while it works (``beat``); ``recover`` puts a running job
  whose heartbeat is older than the stale limit back in the queue (its process died), or fails
  it after ``MAX_ATTEMPTS``. Jobs are written so that running one again is harmless: a refit
  writes everything in its last transaction, a fleet comparison or sweep is recomputed whole.
- ``hold`` fences a job's final transaction: it locks the job row and checks that the caller
  still owns the claim, so a job taken over by another process is never finished twice.

Services flush, never commit, except the functions taking a session factory, which run their own
short transactions (claim, beat, recover, progress).
"""

from __future__ import annotations

import uuid
from datetime import timedelta
from typing import Any

from sqlalchemy import Select, delete, func, or_, select, text, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session, sessionmaker

from server.db import utcnow
from server.errors import NotFound
from server.jobs.models import Job, JobKind, JobState

MAX_ATTEMPTS = 3  # a job whose process died this many times is failed, not retried
KEEP_FINISHED_DAYS = 14  # finished fleet comparisons and sweeps are pruned after this
CLAIM_LOCK = 7_340_021  # PostgreSQL advisory lock key of the claim (any constant of ours)
ENQUEUED = "sensorledger_enqueued"  # Session.info flag: a job was queued in this transaction


class JobLost(Exception):
    """The job is no longer ours (taken back after a stale heartbeat, or finished elsewhere)."""


def fleet_key(sensor_type_id: int) -> str:
    return f"fleet:{sensor_type_id}"


def enqueue(
    session: Session,
    kind: JobKind,
    reason: str,
    *,
    sensor_type_id: int | None = None,
    requested_by: str | None = None,
    total: int = 0,
) -> Job:
    """A new queued job (the caller commits)."""
    job = Job(
        kind=kind,
        sensor_type_id=sensor_type_id,
        state=JobState.queued,
        reason=reason,
        requested_by=requested_by,
        total=total,
        problems=[],
        attempts=0,
        done=0,
        refitted=0,
        changed_decisions=0,
    )
    session.add(job)
    session.flush()
    session.info[ENQUEUED] = True
    return job


def enqueue_once(
    session: Session,
    kind: JobKind,
    key: str,
    reason: str,
    *,
    sensor_type_id: int | None = None,
) -> int:
    """Queue ``kind`` unless a job with ``key`` is already queued; the queued job's id. Call it
    last in the transaction: the queued job stays row-locked until the caller commits."""
    values: dict[str, Any] = {
        "kind": kind.value,
        "sensor_type_id": sensor_type_id,
        "state": JobState.queued.value,
        "reason": reason,
        "coalesce_key": key,
        "attempts": 0,
        "done": 0,
        "total": 0,
        "refitted": 0,
        "changed_decisions": 0,
        "problems": [],
        "created_at": utcnow(),
    }
    dialect = session.get_bind().dialect.name
    insert = postgresql.insert if dialect == "postgresql" else sqlite.insert
    stmt = insert(Job).values(**values)
    upsert = stmt.on_conflict_do_update(
        index_elements=[Job.coalesce_key], set_={"coalesce_key": stmt.excluded.coalesce_key}
    ).returning(Job.id)
    job_id = session.execute(upsert).scalar_one()
    session.info[ENQUEUED] = True
    return int(job_id)


def _claimable() -> Select[Any]:
    busy = select(Job.sensor_type_id).where(
        Job.state == JobState.running, Job.sensor_type_id.is_not(None)
    )
    return (
        select(Job)
        .where(
            Job.state == JobState.queued,
            or_(Job.sensor_type_id.is_(None), Job.sensor_type_id.not_in(busy)),
        )
        .order_by(Job.id)
        .limit(1)
    )


def anything_queued(factory: sessionmaker[Session]) -> bool:
    """A cheap read: is any job waiting? (Saves SQLite's write lock on an idle poll.)"""
    with factory() as s:
        return s.scalar(select(Job.id).where(Job.state == JobState.queued).limit(1)) is not None


def claim(factory: sessionmaker[Session], worker: str) -> tuple[int, str] | None:
    """Claim the next job for ``worker``: (job id, claim token), or None when none is ready.
    ``factory`` must give writing sessions (see ``server.db.make_sessionmaker``)."""
    with factory() as s:
        if s.get_bind().dialect.name == "postgresql":
            s.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": CLAIM_LOCK})
        now = utcnow()
        job: Job | None = s.scalars(_claimable().with_for_update(skip_locked=True)).first()
        if job is None:
            s.rollback()
            return None
        token = uuid.uuid4().hex
        job.state, job.claimed_by, job.claim_token = JobState.running, worker, token
        job.heartbeat_at, job.coalesce_key = now, None
        job.attempts = (job.attempts or 0) + 1
        job.started_at = job.started_at or now
        s.commit()
        return job.id, token


def beat(factory: sessionmaker[Session], job_id: int, token: str) -> bool:
    """Write the job's heartbeat; False when the job is no longer ours."""
    with factory() as s:
        found = s.execute(
            update(Job)
            .where(Job.id == job_id, Job.claim_token == token, Job.state == JobState.running)
            .values(heartbeat_at=utcnow())
        )
        s.commit()
        return bool(found.rowcount)  # type: ignore[attr-defined]


def progress(factory: sessionmaker[Session], job_id: int, token: str, **values: Any) -> None:
    """Write progress (e.g. ``done``) in a short transaction of its own; raises ``JobLost``."""
    with factory() as s:
        found = s.execute(
            update(Job)
            .where(Job.id == job_id, Job.claim_token == token, Job.state == JobState.running)
            .values(heartbeat_at=utcnow(), **values)
        )
        s.commit()
        if not found.rowcount:  # type: ignore[attr-defined]
            raise JobLost(f"job {job_id} is no longer ours")


def hold(session: Session, job_id: int, token: str) -> Job:
    """The job, row-locked for the rest of the caller's transaction, if it is still ours."""
    job = session.scalar(select(Job).where(Job.id == job_id).with_for_update())
    if job is None or job.claim_token != token or job.state is not JobState.running:
        raise JobLost(f"job {job_id} is no longer ours")
    return job


def finish(job: Job, message: str | None = None) -> None:
    job.state, job.finished_at, job.claim_token = JobState.done, utcnow(), None
    if message is not None:
        job.message = message


def fail(factory: sessionmaker[Session], job_id: int, token: str, message: str) -> None:
    """Mark the job failed (in a transaction of its own) if it is still ours."""
    with factory() as s:
        s.execute(
            update(Job)
            .where(Job.id == job_id, Job.claim_token == token)
            .values(state=JobState.failed, finished_at=utcnow(), message=message, claim_token=None)
        )
        s.commit()


def release(factory: sessionmaker[Session], job_id: int, token: str) -> None:
    """Give a claimed job back to the queue (the server is stopping); it starts afresh."""
    with factory() as s:
        s.execute(
            update(Job)
            .where(Job.id == job_id, Job.claim_token == token, Job.state == JobState.running)
            .values(
                state=JobState.queued,
                claimed_by=None,
                claim_token=None,
                attempts=Job.attempts - 1,
                message="put back in the queue: the server stopped while it ran",
            )
        )
        s.commit()


def recover(factory: sessionmaker[Session], stale_after_s: float) -> int:
    """Take back running jobs whose heartbeat stopped (their process died): queued again, or
    failed after ``MAX_ATTEMPTS``. Prunes old finished fleet comparisons and sweeps. How many
    jobs were taken back."""
    now = utcnow()
    cutoff = now - timedelta(seconds=stale_after_s)
    with factory() as s:
        stale = list(
            s.scalars(
                select(Job)
                .where(
                    Job.state == JobState.running,
                    or_(Job.heartbeat_at.is_(None), Job.heartbeat_at < cutoff),
                )
                .with_for_update(skip_locked=True)
            )
        )
        for job in stale:
            gone = f"{job.claimed_by or 'a server'} stopped while the job ran"
            if job.attempts >= MAX_ATTEMPTS:
                job.state, job.finished_at = JobState.failed, now
                job.message = (
                    f"failed, nothing was changed: {gone}, {job.attempts} times. Start it again."
                )
            else:
                job.state = JobState.queued
                job.message = f"resumed: {gone}; nothing had been written, it starts again"
            job.claimed_by = job.claim_token = None
        s.execute(
            delete(Job).where(
                Job.kind.in_([JobKind.fleet, JobKind.overdue_sweep]),
                Job.state == JobState.done,
                Job.finished_at < now - timedelta(days=KEEP_FINISHED_DAYS),
            )
        )
        s.commit()
        return len(stale)


def get_job(session: Session, job_id: int) -> Job:
    job = session.get(Job, job_id)
    if job is None:
        raise NotFound(f"job {job_id} not found")
    return job


def pending(session: Session, kind: JobKind, sensor_type_id: int) -> bool:
    """Is a job of ``kind`` for the type queued or running? (The pages' "catching up".)"""
    found = session.scalar(
        select(func.count())
        .select_from(Job)
        .where(
            Job.kind == kind,
            Job.sensor_type_id == sensor_type_id,
            Job.state.in_([JobState.queued, JobState.running]),
        )
    )
    return bool(found)


def unfinished(session: Session) -> int:
    """Jobs queued or running, all kinds (tests and shutdown wait for 0)."""
    return (
        session.scalar(
            select(func.count())
            .select_from(Job)
            .where(Job.state.in_([JobState.queued, JobState.running]))
        )
        or 0
    )
