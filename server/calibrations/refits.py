"""Refit every calibration of a sensor type in the background, after an edit that changes how
the type is fitted or judged (or on request, e.g. after an engine upgrade).

A job runs in two phases so that it never leaves the records half-changed:

1. **Fit** (long): each calibration session of the type that is not voided is fitted again from
   its stored points with the type's settings as they are now (``service.fit_points``: every family
   ranked, the session's type B inputs). Only the job row is written, in short transactions, to
   show progress (``done`` of ``total``).
2. **Write** (short, one transaction): each new fit is added as the session's current fit (the
   previous one is kept, ``is_current`` false), the type's flags are recomputed, the job is
   marked done. A failure anywhere rolls this back and marks the job failed: nothing changed.

A session that asked for a family keeps it while the type still lists it; otherwise the ranking's
recommendation is kept, as for a new calibration. A session that cannot be fitted any more keeps
its previous fit and is listed in the job's ``problems``.

Jobs run one at a time on a single worker thread per app (``JobRunner``). A job left queued or
running by a server that stopped is marked failed when the app starts again (nothing was written,
see phase 2); start the refit again.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload, sessionmaker

import shared
from server.audit import service as audit
from server.calibrations.models import (
    CalibrationSession,
    FitRecord,
    JobState,
    RefitJob,
)
from server.calibrations.schemas import JobRead, PointIn, RefitProblemRead
from server.calibrations.service import Outcome, fit_points, type_b_of
from server.db import utcnow
from server.errors import DomainError, NotFound
from server.fleet.models import SensorType, Unit
from server.fleet.service import TypeChange

log = logging.getLogger("sensorledger.jobs")

PROGRESS_EVERY_S = 0.5  # how often the job row's progress is written while fitting


def start_refit(
    session: Session, sensor_type: SensorType, reason: str, requested_by: str | None
) -> RefitJob:
    """A queued refit job for ``sensor_type``; the caller commits, then submits it to the
    app's ``JobRunner``."""
    job = RefitJob(
        sensor_type=sensor_type,
        state=JobState.queued,
        reason=reason,
        requested_by=requested_by,
        total=len(_sessions_of(session, sensor_type.id)),
        problems=[],
    )
    session.add(job)
    session.flush()
    audit.record(
        session,
        requested_by,
        "refit.started",
        "sensor_type",
        sensor_type.name,
        f"refit of {sensor_type.name} started (job {job.id}): {reason}",
        job_id=job.id,
        sessions=job.total,
    )
    return job


def follow_type_change(
    session: Session, sensor_type: SensorType, change: TypeChange, actor: str | None
) -> RefitJob | None:
    """What an edit of a type sets off: a refit job when it changed fitting or acceptance (the
    caller commits, then submits it), else the type's flags recomputed when it changed the drift
    limit or interval; None when no job was started."""
    if change.needs_refit:
        return start_refit(session, sensor_type, change.describe(), actor)
    if change.needs_recompute:
        from server.flags.service import recompute_flags  # flags build on calibrations

        recompute_flags(session, sensor_type)
    return None


def get_job(session: Session, job_id: int) -> RefitJob:
    job = session.get(RefitJob, job_id)
    if job is None:
        raise NotFound(f"job {job_id} not found")
    return job


def jobs_of(session: Session, sensor_type: SensorType, limit: int = 10) -> list[RefitJob]:
    """The type's newest jobs first."""
    return list(
        session.scalars(
            select(RefitJob)
            .where(RefitJob.sensor_type_id == sensor_type.id)
            .order_by(RefitJob.id.desc())
            .limit(limit)
        )
    )


def job_read(job: RefitJob) -> JobRead:
    return JobRead(
        id=job.id,
        sensor_type=job.sensor_type.name,
        state=job.state.value,
        reason=job.reason,
        requested_by=job.requested_by,
        done=job.done,
        total=job.total,
        refitted=job.refitted,
        changed_decisions=job.changed_decisions,
        problems=[RefitProblemRead(**p) for p in job.problems or []],
        message=job.message,
        created_at=job.created_at,
        started_at=job.started_at,
        finished_at=job.finished_at,
    )


def fail_interrupted(session: Session) -> int:
    """Mark jobs a stopped server left queued or running as failed; how many."""
    stale = list(
        session.scalars(
            select(RefitJob).where(RefitJob.state.in_([JobState.queued, JobState.running]))
        )
    )
    for job in stale:
        job.state, job.finished_at = JobState.failed, utcnow()
        job.message = (
            "interrupted: the server stopped before the job finished; nothing was changed. "
            "Start the refit again."
        )
    session.flush()
    return len(stale)


# -- the work --------------------------------------------------------------------------------------


def _sessions_of(session: Session, sensor_type_id: int) -> list[CalibrationSession]:
    """The type's calibration sessions that are not voided, by unit then date."""
    return list(
        session.scalars(
            select(CalibrationSession)
            .join(CalibrationSession.unit)
            .where(Unit.sensor_type_id == sensor_type_id, CalibrationSession.voided_at.is_(None))
            .options(
                selectinload(CalibrationSession.points),
                selectinload(CalibrationSession.fits),
                selectinload(CalibrationSession.unit),
            )
            .order_by(Unit.serial, CalibrationSession.performed_at, CalibrationSession.id)
        )
    )


def _requested_family(record: CalibrationSession, sensor_type: SensorType) -> str | None:
    """The family the session asked for, while the type still lists it."""
    current = record.current_fit
    if current is None or not current.ranking:
        return None
    if current.ranking.get("chosen_because") != "requested":
        return None
    return current.family if current.family in sensor_type.families else None


def refit_session(record: CalibrationSession, sensor_type: SensorType) -> Outcome:
    """A new fit of a stored session with the type's current settings; nothing is stored."""
    points = [
        PointIn(
            reference_value=p.reference_value,
            reading=p.reading,
            excluded=p.excluded,
            exclude_reason=p.exclude_reason,
        )
        for p in record.points
    ]
    inputs = type_b_of(
        sensor_type,
        record.reference_expanded_u,
        record.reference_k,
        record.extra_u,
        record.extra_label,
    )
    return fit_points(sensor_type, points, _requested_family(record, sensor_type), inputs)


@dataclass(frozen=True, slots=True)
class _Refitted:
    session_id: int
    outcome: Outcome


def _progress(factory: sessionmaker[Session], job_id: int, **values: Any) -> None:
    with factory() as s:
        job = s.get(RefitJob, job_id)
        if job is not None:
            for name, value in values.items():
                setattr(job, name, value)
            s.commit()


def _fit_all(
    factory: sessionmaker[Session], job_id: int
) -> tuple[list[_Refitted], list[dict[str, Any]]]:
    """Phase 1: fit every session again; only progress is written."""
    results: list[_Refitted] = []
    problems: list[dict[str, Any]] = []
    with factory() as s:
        job = get_job(s, job_id)
        sensor_type = job.sensor_type
        records = _sessions_of(s, sensor_type.id)
        s.expunge_all()  # what the fits need is loaded: work detached, hold no transaction
        s.rollback()
        _progress(factory, job_id, state=JobState.running, started_at=utcnow(), total=len(records))
        last = time.monotonic()
        for i, record in enumerate(records, start=1):
            try:
                results.append(_Refitted(record.id, refit_session(record, sensor_type)))
            except (DomainError, shared.CalibrationError) as exc:
                problems.append(
                    {
                        "session_id": record.id,
                        "unit": record.unit.serial,
                        "performed_at": record.performed_at.isoformat(),
                        "reason": str(exc),
                    }
                )
            if time.monotonic() - last >= PROGRESS_EVERY_S or i == len(records):
                _progress(factory, job_id, done=i)
                last = time.monotonic()
    return results, problems


def _write_all(
    factory: sessionmaker[Session],
    job_id: int,
    results: list[_Refitted],
    problems: list[dict[str, Any]],
) -> None:
    """Phase 2: the new fits, the flags and the job's end, in one transaction."""
    from server.flags.service import recompute_flags  # flags build on calibrations

    with factory() as s:
        job = get_job(s, job_id)
        by_id = {
            r.id: r
            for r in s.scalars(
                select(CalibrationSession)
                .where(CalibrationSession.id.in_([x.session_id for x in results]))
                .options(
                    selectinload(CalibrationSession.fits), selectinload(CalibrationSession.unit)
                )
            )
        }
        refitted = changed = 0
        for item in results:
            record = by_id.get(item.session_id)
            if record is None or record.voided_at is not None:
                continue  # voided while the job ran: leave it as it is
            previous = record.current_fit
            for old in record.fits:
                old.is_current = False
            result, decision = item.outcome.fit, item.outcome.decision
            record.fits.append(
                FitRecord(
                    family=result.family,
                    options=dict(result.options),
                    result=result.to_dict(),
                    decision=decision.to_dict(),
                    ranking=item.outcome.ranking,
                    diagnostics=item.outcome.diagnostics,
                    passed=decision.passed,
                    is_current=True,
                    engine_version=result.engine_version,
                )
            )
            refitted += 1
            if previous is not None and previous.passed != decision.passed:
                changed += 1
            if previous is None or (previous.passed, previous.family) != (
                decision.passed,
                result.family,
            ):
                audit.record(
                    s,
                    job.requested_by,
                    "calibration.refitted",
                    "unit",
                    record.unit.serial,
                    f"calibration of {record.performed_at:%Y-%m-%d} refitted (job {job.id}): "
                    + _verdict(previous)
                    + f" -> {result.family}, {'passed' if decision.passed else 'failed'}",
                    session_id=record.id,
                    job_id=job.id,
                    previous_family=previous.family if previous else None,
                    previous_passed=previous.passed if previous else None,
                    family=result.family,
                    passed=decision.passed,
                )
        s.flush()
        recompute_flags(s, job.sensor_type)
        job.state, job.finished_at = JobState.done, utcnow()
        job.done, job.refitted, job.changed_decisions, job.problems = (
            job.total,
            refitted,
            changed,
            problems,
        )
        job.message = (
            f"refitted {refitted} calibration{'s' if refitted != 1 else ''}"
            f"; {changed} decision{'s' if changed != 1 else ''} changed"
            + (f"; {len(problems)} could not be refitted (previous fit kept)" if problems else "")
        )
        audit.record(
            s,
            job.requested_by,
            "refit.finished",
            "sensor_type",
            job.sensor_type.name,
            f"refit of {job.sensor_type.name} finished (job {job.id}): {job.message}",
            job_id=job.id,
            refitted=refitted,
            changed_decisions=changed,
            problems=problems,
        )
        s.commit()


def _verdict(fit: FitRecord | None) -> str:
    return "no fit" if fit is None else f"{fit.family}, {'passed' if fit.passed else 'failed'}"


def run_refit(factory: sessionmaker[Session], job_id: int) -> None:
    """Run one job to its end (done or failed); never raises."""
    try:
        results, problems = _fit_all(factory, job_id)
        _write_all(factory, job_id, results, problems)
    except Exception as exc:  # a bug or a lost database: the job says so, nothing was written
        log.exception("refit job %s failed", job_id)
        _progress(
            factory,
            job_id,
            state=JobState.failed,
            finished_at=utcnow(),
            message=f"failed, nothing was changed: {type(exc).__name__}: {exc}",
        )


class JobRunner:
    """One worker thread per app: jobs (and periodic chores, see ``every``) run one after
    another, in the order submitted, so they never write the database at the same time."""

    def __init__(self, factory: sessionmaker[Session]) -> None:
        self._factory = factory
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="sensorledger-job")
        self._lock = threading.Lock()
        self._pending: list[Future[None]] = []
        self._stop = threading.Event()
        self._tickers: list[threading.Thread] = []

    def submit(self, job_id: int) -> Future[None]:
        return self._queue(run_refit, self._factory, job_id)

    def _queue(self, fn: Callable[..., None], *args: Any) -> Future[None]:
        with self._lock:
            future = self._pool.submit(fn, *args)
            self._pending = [f for f in self._pending if not f.done()] + [future]
        return future

    def every(self, seconds: float, chore: Callable[[Session], object], name: str) -> None:
        """Queue ``chore(session)`` (then commit) every ``seconds`` until shutdown; a chore that
        fails is logged and tried again next time."""

        def run() -> None:
            try:
                with self._factory() as session:
                    chore(session)
                    session.commit()
            except Exception:
                log.exception("%s failed", name)

        def tick() -> None:
            while not self._stop.wait(seconds):
                self._queue(run)

        ticker = threading.Thread(target=tick, name=f"sensorledger-{name}", daemon=True)
        ticker.start()
        self._tickers.append(ticker)

    def wait(self, timeout: float | None = None) -> None:
        """Wait for the jobs submitted so far (tests, shutdown)."""
        with self._lock:
            pending = list(self._pending)
        for future in pending:
            future.result(timeout)

    def shutdown(self) -> None:
        self._stop.set()
        for ticker in self._tickers:
            ticker.join()
        self._pool.shutdown(wait=True, cancel_futures=False)
