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

The job is a database row (``server.jobs``): any server process may run it, one job per type at a
time. A job whose process died is resumed from the start by another (nothing had been written,
see phase 2); a job that fails is marked failed with the reason, and nothing changed.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

import shared
from server.audit import service as audit
from server.calibrations.models import CalibrationSession, FitRecord
from server.calibrations.schemas import JobRead, PointIn, RefitProblemRead
from server.calibrations.service import Outcome, fit_points, type_b_of, with_standard_problem
from server.errors import DomainError
from server.fleet.models import SensorType, Unit
from server.fleet.service import TypeChange
from server.jobs import service as jobs
from server.jobs.models import Job, JobKind
from server.jobs.runner import JobContext

PROGRESS_EVERY_S = 0.5  # how often the job row's progress is written while fitting


def start_refit(
    session: Session, sensor_type: SensorType, reason: str, requested_by: str | None
) -> Job:
    """A queued refit job for ``sensor_type``; the caller commits (a job runner of any server
    process then claims it)."""
    job = jobs.enqueue(
        session,
        JobKind.refit,
        reason,
        sensor_type_id=sensor_type.id,
        requested_by=requested_by,
        total=_count_sessions(session, sensor_type.id),
    )
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
) -> Job | None:
    """What an edit of a type sets off: a refit job when it changed fitting or acceptance (the
    caller commits, then submits it), else the type's flags recomputed when it changed the drift
    limit or interval; None when no job was started."""
    if change.needs_refit:
        return start_refit(session, sensor_type, change.describe(), actor)
    if change.needs_recompute:
        from server.flags.service import recompute_flags  # flags build on calibrations

        recompute_flags(session, sensor_type)
    return None


def jobs_of(session: Session, sensor_type: SensorType, limit: int = 10) -> list[Job]:
    """The type's newest refit jobs first."""
    return list(
        session.scalars(
            select(Job)
            .where(Job.sensor_type_id == sensor_type.id, Job.kind == JobKind.refit)
            .order_by(Job.id.desc())
            .limit(limit)
        )
    )


def job_read(job: Job) -> JobRead:
    return JobRead(
        id=job.id,
        kind=job.kind.value,
        sensor_type=job.sensor_type.name if job.sensor_type is not None else None,
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


# -- the work --------------------------------------------------------------------------------------


def _count_sessions(session: Session, sensor_type_id: int) -> int:
    from sqlalchemy import func

    return (
        session.scalar(
            select(func.count())
            .select_from(CalibrationSession)
            .join(CalibrationSession.unit)
            .where(Unit.sensor_type_id == sensor_type_id, CalibrationSession.voided_at.is_(None))
        )
        or 0
    )


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
    return with_standard_problem(
        fit_points(sensor_type, points, _requested_family(record, sensor_type), inputs),
        record.reference_standard_problem,
    )


@dataclass(frozen=True, slots=True)
class _Refitted:
    session_id: int
    outcome: Outcome


def _fit_all(ctx: JobContext) -> tuple[list[_Refitted], list[dict[str, Any]]]:
    """Phase 1: fit every session again; only progress is written."""
    results: list[_Refitted] = []
    problems: list[dict[str, Any]] = []
    with ctx.read_factory() as s:
        job = jobs.get_job(s, ctx.job_id)
        sensor_type = job.sensor_type
        assert sensor_type is not None
        records = _sessions_of(s, sensor_type.id)
        s.expunge_all()  # what the fits need is loaded: work detached, hold no transaction
        s.rollback()
    ctx.progress(total=len(records), done=0)
    last = time.monotonic()
    for i, record in enumerate(records, start=1):
        ctx.stopping()
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
            ctx.progress(done=i)
            last = time.monotonic()
    return results, problems


def _write_all(ctx: JobContext, results: list[_Refitted], problems: list[dict[str, Any]]) -> None:
    """Phase 2: the new fits, the flags and the job's end, in one transaction (fenced: only
    while the job is still this process's)."""
    from server.flags.service import recompute_flags  # flags build on calibrations

    with ctx.factory() as s:
        job = ctx.hold(s)
        sensor_type = job.sensor_type
        assert sensor_type is not None
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
                    noise_check=item.outcome.noise_check,
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
        recompute_flags(s, sensor_type)
        jobs.finish(job)
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
            sensor_type.name,
            f"refit of {sensor_type.name} finished (job {job.id}): {job.message}",
            job_id=job.id,
            refitted=refitted,
            changed_decisions=changed,
            problems=problems,
        )
        s.commit()


def _verdict(fit: FitRecord | None) -> str:
    return "no fit" if fit is None else f"{fit.family}, {'passed' if fit.passed else 'failed'}"


def run_refit(ctx: JobContext) -> None:
    """The refit job's handler: phase 1 then phase 2. An error propagates to the runner, which
    marks the job failed (nothing was written)."""
    results, problems = _fit_all(ctx)
    _write_all(ctx, results, problems)
