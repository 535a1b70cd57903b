"""Flags a shop acts on, recomputed per sensor type; installation events of a unit.

``recompute_flags`` judges every unit of a type from its stored calibrations (nothing is refitted)
and its installation events:

- ``failed_acceptance``: the current calibration failed acceptance (action).
- ``drift``: ``shared.drift.compare`` of the last two valid calibrations with the type's drift
  limit says drifted (action). The evidence keeps a compact grid of the deviation and the
  simultaneous band for the plot.
- ``out_of_tolerance_in_service``: ``shared.drift.as_found``, the previous fit applied to the
  newest session's points with the type's tolerance, has a point out (action); the evidence names
  the installations that overlapped the time between the two calibrations.
- ``fleet_outlier``: the units of the type compared with each other (``server.flags.fleet``, a
  background job after a unit's change): |z| >= 3 is ``action``, 2 < |z| < 3 ``warning``.
- ``overdue``: the due date (``server.fleet.service.unit_due``: the interval adjusted by the
  drift history, as on the fleet page; stored on the unit here) has passed: ``warning`` for the
  first 30 days, ``action`` after. The evidence carries the due date's basis.
- ``reference_suspect``: raised when a reference standard fails its own check, and opened or
  closed here by ``server.standards.suspect.refresh`` (see there).

Each flag has a ``key`` naming its condition (kind, unit, and the calibrations it is about), so a
recomputation that finds the same condition keeps the row, its ``raised_at`` and its
acknowledgement and only refreshes the numbers; a condition that no longer holds is closed
(``open`` false, ``closed_at``), never deleted. ``open`` means "the condition holds";
acknowledging is separate and does not close a flag. Retired units get no flags.

Services flush, never commit.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime
from typing import Any

from sqlalchemy import Select, func, or_, select
from sqlalchemy.orm import Session, object_session, selectinload, sessionmaker

from server.audit import service as audit
from server.calibrations.models import CalibrationSession, FitRecord
from server.db import utcnow
from server.errors import Conflict, Invalid, NotFound
from server.flags.conditions import OVERDUE_ACTION_DAYS, find_conditions
from server.flags.fleet import queue, recompute_fleet
from server.flags.models import EventKind, Flag, FlagKind, InstallationEvent, Severity
from server.flags.schemas import EventCreate, EventRead, FlagRead
from server.fleet.models import SensorType, Unit, UnitStatus
from server.jobs import service as jobs
from server.jobs.models import JobKind
from server.jobs.runner import JobContext
from server.pagination import PageParams, paged
from server.standards import suspect

ABBREVIATIONS = {  # the fleet page's badges
    FlagKind.drift: "DRIFT",
    FlagKind.out_of_tolerance_in_service: "OOT",
    FlagKind.fleet_outlier: "ODD",
    FlagKind.failed_acceptance: "FAIL",
    FlagKind.overdue: "DUE",
    FlagKind.reference_suspect: "REF",
}
TITLES = {
    FlagKind.drift: "Drifted between calibrations",
    FlagKind.out_of_tolerance_in_service: "Out of tolerance while in service",
    FlagKind.fleet_outlier: "Reads unlike its siblings",
    FlagKind.failed_acceptance: "Failed acceptance",
    FlagKind.overdue: "Overdue for recalibration",
    FlagKind.reference_suspect: "Calibrated against a suspect standard",
}


@dataclass(frozen=True, slots=True)
class OpenBadge:
    """What the fleet page shows of an open flag beside its unit."""

    id: int
    kind: FlagKind
    severity: Severity
    acknowledged_at: datetime | None
    message: str


# -- installations ---------------------------------------------------------------------------------


def list_events(session: Session, unit: Unit) -> list[InstallationEvent]:
    """The unit's installation events, oldest first."""
    return list(
        session.scalars(
            select(InstallationEvent)
            .where(InstallationEvent.unit_id == unit.id)
            .order_by(InstallationEvent.at, InstallationEvent.id)
        )
    )


def create_event(
    session: Session, unit: Unit, data: EventCreate, recorded_by: str | None
) -> InstallationEvent:
    """Record an installation or a removal and keep the unit's status and installed-in in step."""
    location = (data.location or "").strip() or None
    events = list_events(session, unit)
    if events and data.at < events[-1].at:
        raise Invalid(
            f"the unit's last event ({events[-1].kind.value} on {events[-1].at:%Y-%m-%d %H:%M} "
            "UTC) is later; events are recorded in order",
            field="at",
        )
    if data.kind is EventKind.installed:
        if location is None:
            raise Invalid("say where the unit is installed", field="location")
        if unit.status is UnitStatus.installed:
            raise Invalid(
                f"{unit.serial} is already installed in {unit.installed_in or 'an instrument'}; "
                "record its removal first",
                field="kind",
            )
        if unit.status in (UnitStatus.quarantined, UnitStatus.retired):
            raise Invalid(
                f"{unit.serial} is {unit.status.value}; it cannot be installed", field="kind"
            )
    elif unit.status is not UnitStatus.installed:
        raise Invalid(
            f"{unit.serial} is not installed (status {unit.status.value.replace('_', ' ')}); "
            "there is nothing to remove it from",
            field="kind",
        )
    if data.kind is EventKind.removed:
        location = location or unit.installed_in
    event = InstallationEvent(
        unit=unit,
        kind=data.kind,
        location=location,
        at=data.at,
        recorded_by=recorded_by,
        note=(data.note or "").strip() or None,
    )
    if data.kind is EventKind.installed:
        unit.status, unit.installed_in = UnitStatus.installed, location
    else:
        unit.status, unit.installed_in = UnitStatus.in_stock, None
    session.add(event)
    session.flush()
    audit.record(
        session,
        recorded_by,
        f"unit.{data.kind.value}",
        "unit",
        unit.serial,
        f"{unit.serial} {data.kind.value} {'in' if data.kind is EventKind.installed else 'from'} "
        f"{location} on {data.at:%Y-%m-%d}",
        event_id=event.id,
        location=location,
        at=data.at,
        note=event.note,
    )
    return event


def event_read(event: InstallationEvent) -> EventRead:
    return EventRead(
        id=event.id,
        unit=event.unit.serial,
        kind=event.kind,
        location=event.location,
        at=event.at,
        recorded_by=event.recorded_by,
        note=event.note,
    )


# -- recomputation (the conditions themselves: server.flags.conditions) --------------------------


def recompute_flags(
    session: Session,
    sensor_type: SensorType,
    *,
    today: date | None = None,
    units: list[Unit] | None = None,
) -> list[Flag]:
    """Raise, refresh and close the flags of the units of ``sensor_type``; the open ones.

    With ``units`` (a calibration, void, event or status change of those units) only their own
    flags and due dates are recomputed (a unit's drift, as-found and due date depend on its own
    sessions alone), and the fleet comparison of the type is queued as a background job (call
    this last before the commit); a retired unit's flags all close. Without ``units``, every
    flag of the type including the fleet comparison, at once (an edit or refit of the type, the
    demo load)."""
    now = utcnow()
    only = None if units is None else {u.id for u in units}
    retired = {u.id for u in units or [] if u.status is UnitStatus.retired}
    found = {f.key: f for f in find_conditions(session, sensor_type, today, only)}
    query = select(Flag).where(Flag.open.is_(True))
    if only is None:
        query = query.join(Flag.unit).where(Unit.sensor_type_id == sensor_type.id)
    else:
        query = query.where(Flag.unit_id.in_(only))
    existing = {
        f.key: f
        for f in session.scalars(query)
        if (f.kind is not FlagKind.fleet_outlier or f.unit_id in retired)
        and f.kind is not FlagKind.reference_suspect  # kept by server.standards.suspect
    }
    # closed flags whose condition came back are opened again (their row and note are kept)
    returning = [key for key in found if key not in existing]
    if returning:
        for f in session.scalars(select(Flag).where(Flag.key.in_(returning))):
            existing[f.key] = f
    for key, gone in existing.items():
        if key not in found and gone.open:
            gone.open, gone.closed_at = False, now
    kept = []
    for key, item in found.items():
        flag = existing.get(key)
        if flag is None:
            flag = Flag(unit=item.unit, kind=item.kind, key=key, raised_at=now)
            session.add(flag)
        flag.severity, flag.message, flag.evidence = item.severity, item.message, item.evidence
        flag.open, flag.closed_at = True, None
        kept.append(flag)
    session.flush()
    kept += suspect.refresh(session, sensor_type, only)
    if units is None:
        kept += recompute_fleet(session, sensor_type)
    else:
        queue(session, sensor_type)
    return kept


def recompute_all(session: Session, *, today: date | None = None) -> None:
    """``recompute_flags`` for every sensor type."""
    for sensor_type in session.scalars(select(SensorType).order_by(SensorType.name)):
        recompute_flags(session, sensor_type, today=today)


def sweep_overdue(session: Session, *, today: date | None = None) -> int:
    """Raise the overdue flags that time alone has brought (no calibration or event since):
    units in service whose stored due date has passed without an open overdue flag, or whose
    overdue warning has become an action; their flags are recomputed. How many units. One
    query when there are none; the app runs it on start and every hour."""
    today = today or utcnow().date()
    late = list(
        session.scalars(
            select(Unit).where(
                Unit.due_on.is_not(None),
                Unit.due_on < today,
                Unit.status.in_([UnitStatus.in_stock, UnitStatus.installed]),
            )
        )
    )
    if not late:
        return 0
    flagged = {
        f.unit_id: f
        for f in session.scalars(
            select(Flag).where(
                Flag.kind == FlagKind.overdue,
                Flag.open.is_(True),
                Flag.unit_id.in_([u.id for u in late]),
            )
        )
    }
    stale: dict[int, list[Unit]] = {}
    for unit in late:
        assert unit.due_on is not None
        flag = flagged.get(unit.id)
        should_act = (today - unit.due_on).days > OVERDUE_ACTION_DAYS
        if flag is None or (should_act and flag.severity is not Severity.action):
            stale.setdefault(unit.sensor_type_id, []).append(unit)
    for sensor_type_id, units in stale.items():
        sensor_type = session.get(SensorType, sensor_type_id)
        if sensor_type is not None:
            recompute_flags(session, sensor_type, today=today, units=units)
    return sum(len(u) for u in stale.values())


def run_sweep_job(ctx: JobContext) -> None:
    """The overdue sweep's handler (queued hourly by every server process, coalesced)."""
    with ctx.factory() as s:
        job = ctx.hold(s)
        n = sweep_overdue(s)
        jobs.finish(job, f"{n} unit{'s' if n != 1 else ''} newly overdue")
        s.commit()


def queue_sweep(factory: sessionmaker[Session]) -> None:
    """Queue an overdue sweep unless one is queued already."""
    with factory() as s:
        jobs.enqueue_once(s, JobKind.overdue_sweep, "overdue_sweep", "hourly overdue sweep")
        s.commit()


def bring_due_dates_up(session: Session) -> int:
    """Recompute the types with a calibrated, unretired unit whose due date or fleet curve was
    never stored (a database upgraded from before revision 0004 or 0007); how many types.
    Cheap when there are none: one query."""
    stale = session.scalars(
        select(Unit.sensor_type_id)
        .join(Unit.sessions)
        .join(CalibrationSession.fits)
        .where(
            or_(Unit.due_on.is_(None), Unit.fleet_fit_id.is_(None)),
            Unit.status != UnitStatus.retired,
            CalibrationSession.voided_at.is_(None),
            FitRecord.is_current.is_(True),
        )
        .distinct()
    ).all()
    for sensor_type_id in stale:
        sensor_type = session.get(SensorType, sensor_type_id)
        if sensor_type is not None:
            recompute_flags(session, sensor_type)
    return len(stale)


# -- reading and acknowledging ---------------------------------------------------------------------


def _filtered(
    kind: FlagKind | None,
    sensor_type: str | None,
    open_: bool | None,
    acknowledged: bool | None,
    unit: Unit | None = None,
) -> Select[Any]:
    query = select(Flag).join(Flag.unit)
    if kind is not None:
        query = query.where(Flag.kind == kind)
    if sensor_type:
        query = query.join(Unit.sensor_type).where(SensorType.name == sensor_type)
    if open_ is not None:
        query = query.where(Flag.open.is_(open_))
    if acknowledged is not None:
        query = query.where(
            Flag.acknowledged_at.is_not(None) if acknowledged else Flag.acknowledged_at.is_(None)
        )
    if unit is not None:
        query = query.where(Flag.unit_id == unit.id)
    return query


ORDER = (Flag.open.desc(), Flag.raised_at.desc(), Flag.id.desc())


def list_flags(
    session: Session,
    page: PageParams,
    *,
    kind: FlagKind | None = None,
    sensor_type: str | None = None,
    open_: bool | None = None,
    acknowledged: bool | None = None,
) -> tuple[list[Flag], int]:
    """Flags, open ones first, newest first within."""
    query = _filtered(kind, sensor_type, open_, acknowledged)
    return paged(session, query.options(selectinload(Flag.unit)).order_by(*ORDER), page)


def flags_of(unit: Unit) -> list[Flag]:
    """The unit's flags, open first."""
    session = object_session(unit)
    if session is None:
        return []
    return list(session.scalars(_filtered(None, None, None, None, unit).order_by(*ORDER)))


def count_needing_attention(session: Session) -> int:
    """Open action-level flags nobody has acknowledged: the number beside "Needs attention" (every
    page). Warnings (e.g. a fleet |z| between 2 and 3, which some healthy units show by chance)
    are listed on the page under their own heading, not counted here."""
    query = select(func.count(Flag.id)).where(
        Flag.open.is_(True), Flag.acknowledged_at.is_(None), Flag.severity == Severity.action
    )
    return session.scalar(query) or 0


def open_kinds_by_unit(session: Session, unit_ids: list[int]) -> dict[int, list[OpenBadge]]:
    """Open flags of these units, by unit id (the fleet page's badges): only the columns a badge
    shows, as rows, not whole flags."""
    out: dict[int, list[OpenBadge]] = {}
    if not unit_ids:
        return out
    for row in session.execute(
        select(
            Flag.unit_id,
            Flag.id,
            Flag.kind,
            Flag.severity,
            Flag.acknowledged_at,
            Flag.message,
        )
        .where(Flag.unit_id.in_(unit_ids), Flag.open.is_(True))
        .order_by(Flag.kind, Flag.id)
    ):
        out.setdefault(row.unit_id, []).append(
            OpenBadge(row.id, row.kind, row.severity, row.acknowledged_at, row.message)
        )
    return out


def get_flag(session: Session, flag_id: int) -> Flag:
    flag = session.get(Flag, flag_id)
    if flag is None:
        raise NotFound(f"flag {flag_id} not found")
    return flag


def acknowledge(session: Session, flag: Flag, note: str, who: str) -> Flag:
    """Keep who acknowledged the flag, when, and their note; the flag stays as it is (open
    while its condition holds)."""
    text = note.strip()
    if not text:
        raise Invalid("say what was done or decided: a note is needed", field="note")
    if flag.acknowledged_at is not None:
        raise Conflict(
            f"flag {flag.id} was acknowledged already by {flag.acknowledged_by} on "
            f"{flag.acknowledged_at:%Y-%m-%d %H:%M} UTC",
            field="note",
        )
    flag.acknowledged_by, flag.acknowledged_at, flag.acknowledged_note = who, utcnow(), text
    session.flush()
    audit.record(
        session,
        who,
        "flag.acknowledged",
        "unit",
        flag.unit.serial,
        f"{TITLES[flag.kind].lower()} flag acknowledged: {text}",
        flag_id=flag.id,
        kind=flag.kind,
        message=flag.message,
        note=text,
    )
    return flag


def flag_read(flag: Flag) -> FlagRead:
    return FlagRead(
        id=flag.id,
        unit=flag.unit.serial,
        kind=flag.kind,
        severity=flag.severity,
        message=flag.message,
        detail=flag.message,
        evidence=flag.evidence,
        raised_at=flag.raised_at,
        open=flag.open,
        closed_at=flag.closed_at,
        acknowledged_by=flag.acknowledged_by,
        acknowledged_at=flag.acknowledged_at,
        note=flag.acknowledged_note,
    )
