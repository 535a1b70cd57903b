"""The register: create, look up and list standards, record their checks, and find the units
whose current calibration a standard vouches for. Services flush, never commit.

A standard's *standing* on a day: ``suspect`` when its latest check found it out of tolerance,
else ``overdue`` past its due date, else ``due_soon`` within ``DUE_SOON_DAYS`` of it, else
``ok``. A session performed while its standard was overdue or suspect is stored but does not
pass (``problem_on``).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any, Literal

from sqlalchemy import Select, and_, func, or_, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, aliased, selectinload

from server.audit import service as audit
from server.calibrations.models import CalibrationSession, FitRecord
from server.db import utcnow
from server.errors import Conflict, Invalid, NotFound
from server.fleet.models import SensorType, Unit, UnitStatus
from server.pagination import PageParams, paged
from server.standards.models import ReferenceStandard, StandardCheck
from server.standards.schemas import (
    CheckCreate,
    CheckRead,
    DependentRead,
    StandardCreate,
    StandardDetailRead,
    StandardRead,
    Standing,
)

DUE_SOON_DAYS = 30  # a standard due within this many days shows on Needs attention


def _today() -> date:
    return utcnow().date()


# -- standing --------------------------------------------------------------------------------------


def last_check(standard: ReferenceStandard, on: date | None = None) -> StandardCheck | None:
    """The latest check (on or before ``on``, when given)."""
    checks = [c for c in standard.checks if on is None or c.checked_on <= on]
    return checks[-1] if checks else None


def standing_of(standard: ReferenceStandard, today: date | None = None) -> Standing:
    today = today or _today()
    latest = last_check(standard, today)
    if latest is not None and not latest.in_tolerance:
        return "suspect"
    if standard.due_on < today:
        return "overdue"
    if standard.due_on <= today + timedelta(days=DUE_SOON_DAYS):
        return "due_soon"
    return "ok"


def problem_on(standard: ReferenceStandard, when: datetime) -> str | None:
    """Why the standard cannot vouch for a session performed at ``when``, or None: it was past
    its due date, or its latest check before that day found it out of tolerance."""
    day = when.date()
    latest = last_check(standard, day)
    if latest is not None and not latest.in_tolerance:
        return (
            f"reference standard {standard.name} was found out of tolerance on "
            f"{latest.checked_on:%Y-%m-%d} (before this calibration on {day:%Y-%m-%d}): "
            f"it cannot vouch for it"
        )
    if standard.due_on < day:
        return (
            f"reference standard {standard.name} was overdue: due {standard.due_on:%Y-%m-%d}, "
            f"used on {day:%Y-%m-%d}; recalibrate the standard or use another"
        )
    return None


def last_good_on(standard: ReferenceStandard, before: date, exclude: int | None = None) -> date:
    """When the standard was last known good on or before ``before``: its latest in-tolerance
    check, else the date of its certificate."""
    good = [
        c.checked_on
        for c in standard.checks
        if c.in_tolerance and c.checked_on <= before and c.id != exclude
    ]
    return max(good, default=standard.calibrated_on)


# -- create, find, list ----------------------------------------------------------------------------


Lock = Literal["share", "update"] | None


def find_standard(session: Session, name: str, *, lock: Lock = None) -> ReferenceStandard | None:
    """By name, ignoring case and surrounding blanks (a scanner's input). ``lock`` (PostgreSQL;
    SQLite's writers are one at a time anyway): ``share`` for a session naming it, ``update``
    for a check, so a check and a save against the standard never interleave (a save committed
    while a failed check looked for the units at risk would be missed by it)."""
    wanted = name.strip()
    # the exact name too: SQLite's lower() folds ASCII letters only, so "À" would not find "À"
    query = select(ReferenceStandard).where(
        or_(
            ReferenceStandard.name == wanted,
            func.lower(ReferenceStandard.name) == wanted.lower(),
        )
    )
    if lock is not None:
        query = query.with_for_update(read=lock == "share")
    return session.scalar(query.options(selectinload(ReferenceStandard.checks)))


def get_standard(
    session: Session, name: str, *, field: str | None = None, lock: Lock = None
) -> ReferenceStandard:
    """The standard, or NotFound (Invalid naming ``field`` when a request body named it)."""
    found = find_standard(session, name, lock=lock)
    if found is None:
        message = f"no reference standard {name.strip()[:80]!r} in the register"
        if field is not None:
            raise Invalid(
                message + ": register it first, or give a free-text reference", field=field
            )
        raise NotFound(message)
    return found


def create_standard(
    session: Session, data: StandardCreate, actor: str | None = None
) -> ReferenceStandard:
    if find_standard(session, data.name) is not None:
        raise Conflict(f"reference standard {data.name!r} exists already", field="name")
    standard = ReferenceStandard(
        **data.model_dump(exclude={"description"}),
        description=(data.description or "").strip() or None,
        created_by=actor,
    )
    try:
        with session.begin_nested():  # a register racing this one took the name first
            session.add(standard)
            session.flush()
    except IntegrityError:
        raise Conflict(f"reference standard {data.name!r} exists already", field="name") from None
    audit.record(
        session,
        actor,
        "standard.registered",
        "reference_standard",
        standard.name,
        f"reference standard {standard.name} registered: U = {standard.expanded_u:g} "
        f"{standard.value_unit} (k = {standard.k:g}), due {standard.due_on:%Y-%m-%d}",
        settings=data.model_dump(),
    )
    return standard


def _ordered() -> Select[Any]:
    return (
        select(ReferenceStandard)
        .options(selectinload(ReferenceStandard.checks))
        .order_by(ReferenceStandard.due_on, ReferenceStandard.name)
    )


def list_standards(
    session: Session, page: PageParams, q: str | None = None
) -> tuple[list[ReferenceStandard], int]:
    """Standards, soonest due first; ``q`` filters by a part of the name."""
    query = _ordered()
    if q and q.strip():
        query = query.where(
            func.lower(ReferenceStandard.name).contains(q.strip().lower(), autoescape=True)
        )
    return paged(session, query, page)


def all_names(session: Session) -> list[str]:
    """Every standard's name (the calibration forms' picker)."""
    return list(session.scalars(select(ReferenceStandard.name).order_by(ReferenceStandard.name)))


def needing_attention(session: Session, today: date | None = None) -> list[ReferenceStandard]:
    """Standards overdue, due within DUE_SOON_DAYS, or found out of tolerance by their latest
    check; suspect first, then overdue, then due soon, soonest due first within."""
    today = today or _today()
    soon = today + timedelta(days=DUE_SOON_DAYS)
    failed = (
        select(StandardCheck.standard_id).where(StandardCheck.in_tolerance.is_(False)).distinct()
    )
    found = session.scalars(
        _ordered().where((ReferenceStandard.due_on <= soon) | ReferenceStandard.id.in_(failed))
    ).all()
    rank = {"suspect": 0, "overdue": 1, "due_soon": 2, "ok": 3}
    chosen = [s for s in found if standing_of(s, today) != "ok"]
    return sorted(chosen, key=lambda s: (rank[standing_of(s, today)], s.due_on, s.name))


# -- the units a standard vouches for --------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Dependent:
    """A unit whose current calibration was performed against a standard."""

    unit_id: int
    serial: str
    sensor_type: str
    status: UnitStatus
    installed_in: str | None
    calibration_id: int
    calibrated_at: datetime
    passed: bool | None


def dependents(session: Session, standard: ReferenceStandard) -> list[Dependent]:
    """Every unit (not retired) whose current calibration (its latest valid session, as
    ``latest_session``) named ``standard``, newest calibration first: one statement, the
    sessions found through their reference_standard_id index and each checked against its
    unit's latest valid session by a correlated subquery."""
    newest = aliased(CalibrationSession)
    newest_fit = aliased(FitRecord)
    latest = (
        select(newest.id)
        .join(newest_fit, and_(newest_fit.session_id == newest.id, newest_fit.is_current))
        .where(newest.unit_id == Unit.id, newest.voided_at.is_(None))
        .order_by(newest.performed_at.desc(), newest.id.desc())
        .limit(1)
        .correlate(Unit)
        .scalar_subquery()
    )
    rows = session.execute(
        select(
            Unit.id,
            Unit.serial,
            SensorType.name,
            Unit.status,
            Unit.installed_in,
            CalibrationSession.id,
            CalibrationSession.performed_at,
            FitRecord.passed,
        )
        .select_from(CalibrationSession)
        .join(Unit, Unit.id == CalibrationSession.unit_id)
        .join(SensorType, SensorType.id == Unit.sensor_type_id)
        .outerjoin(
            FitRecord,
            and_(FitRecord.session_id == CalibrationSession.id, FitRecord.is_current),
        )
        .where(
            CalibrationSession.reference_standard_id == standard.id,
            CalibrationSession.voided_at.is_(None),
            Unit.status != UnitStatus.retired,
            CalibrationSession.id == latest,
        )
        .order_by(CalibrationSession.performed_at.desc(), Unit.serial)
    )
    return [Dependent(*row) for row in rows]


def at_risk(standard: ReferenceStandard, found: list[Dependent], since: date) -> list[Dependent]:
    """Those of ``found`` calibrated on or after ``since`` (the day the standard was last known
    good: a session on that day itself is counted, as its order against the check is unknown)."""
    return [d for d in found if d.calibrated_at.date() >= since]


# -- checks ----------------------------------------------------------------------------------------


def add_check(
    session: Session, standard: ReferenceStandard, data: CheckCreate, actor: str | None
) -> StandardCheck:
    """Record a check of the standard (the caller raises the flags of a failed one)."""
    today = _today()
    if data.checked_on > today:
        raise Invalid(
            f"checked_on {data.checked_on:%Y-%m-%d} is in the future (today is "
            f"{today:%Y-%m-%d} UTC)",
            field="checked_on",
        )
    if data.checked_on < standard.calibrated_on:
        raise Invalid(
            f"checked_on {data.checked_on:%Y-%m-%d} is before the standard's certificate "
            f"({standard.calibrated_on:%Y-%m-%d})",
            field="checked_on",
        )
    if data.due_on is not None:
        if not data.in_tolerance:
            raise Invalid(
                "a standard found out of tolerance gets no new due date; record its next "
                "in-tolerance check with one",
                field="due_on",
            )
        if data.due_on <= data.checked_on:
            raise Invalid("due_on must be later than checked_on", field="due_on")
    check = StandardCheck(
        standard=standard,
        checked_on=data.checked_on,
        in_tolerance=data.in_tolerance,
        note=(data.note or "").strip() or None,
        recorded_by=actor,
    )
    session.add(check)
    if data.due_on is not None:
        standard.due_on = data.due_on
    session.flush()
    session.refresh(standard, ["checks"])
    return check


def record_check(
    session: Session,
    standard: ReferenceStandard,
    check: StandardCheck,
    due_before: date,
    flagged: list[str],
    actor: str | None,
) -> None:
    """The check's audit entry, with the units it flagged."""
    audit.record(
        session,
        actor,
        "standard.checked",
        "reference_standard",
        standard.name,
        f"reference standard {standard.name} checked on {check.checked_on:%Y-%m-%d}: "
        + ("in tolerance" if check.in_tolerance else "OUT OF TOLERANCE")
        + (
            f"; due {due_before:%Y-%m-%d} -> {standard.due_on:%Y-%m-%d}"
            if standard.due_on != due_before
            else ""
        )
        + (f"; {len(flagged)} unit{'s' if len(flagged) != 1 else ''} flagged" if flagged else ""),
        check_id=check.id,
        checked_on=check.checked_on,
        in_tolerance=check.in_tolerance,
        note=check.note,
        due_on=standard.due_on,
        flagged=flagged,
    )


# -- reads -----------------------------------------------------------------------------------------


def check_read(check: StandardCheck) -> CheckRead:
    return CheckRead(
        id=check.id,
        checked_on=check.checked_on,
        in_tolerance=check.in_tolerance,
        note=check.note,
        recorded_by=check.recorded_by,
        created_at=check.created_at,
    )


def standard_read(standard: ReferenceStandard, today: date | None = None) -> StandardRead:
    latest = last_check(standard)
    return StandardRead(
        name=standard.name,
        description=standard.description,
        quantity=standard.quantity,
        value_unit=standard.value_unit,
        expanded_u=standard.expanded_u,
        k=standard.k,
        certificate=standard.certificate,
        calibrated_on=standard.calibrated_on,
        due_on=standard.due_on,
        standing=standing_of(standard, today),
        last_check_on=latest.checked_on if latest else None,
        last_check_in_tolerance=latest.in_tolerance if latest else None,
        created_at=standard.created_at,
    )


def dependent_read(standard: ReferenceStandard, d: Dependent, since: date) -> DependentRead:
    return DependentRead(
        serial=d.serial,
        sensor_type=d.sensor_type,
        status=d.status.value,
        installed_in=d.installed_in,
        calibration_id=d.calibration_id,
        calibrated_at=d.calibrated_at,
        passed=d.passed,
        since_last_good_check=d.calibrated_at.date() >= since,
    )


def detail_read(session: Session, standard: ReferenceStandard) -> StandardDetailRead:
    since = last_good_on(standard, _today())
    return StandardDetailRead(
        **standard_read(standard).model_dump(),
        checks=[check_read(c) for c in standard.checks],
        units=[dependent_read(standard, d, since) for d in dependents(session, standard)],
    )


# -- sessions naming a standard --------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Named:
    """What a session body's ``reference_standard`` resolves to."""

    standard: ReferenceStandard
    problem: str | None  # why it cannot vouch for the session (the session then fails)


def resolve_for_session(
    session: Session,
    name: str,
    performed_at: datetime,
    value_unit: str,
    *,
    reference: str | None,
    given_u: float | None,
    given_k: float | None,
) -> Named:
    """The standard a session names, checked against the rest of the body: a free-text
    reference other than its name, a U or k other than the register's, or a standard stated in
    another unit than the sensor type's values is refused (Invalid naming the field)."""
    standard = get_standard(session, name, field="reference_standard", lock="share")
    if reference is not None and reference.strip().lower() != standard.name.lower():
        raise Invalid(
            f"reference {reference!r} differs from reference_standard {standard.name!r}: name "
            "the standard alone (the session's reference is its name)",
            field="reference",
        )
    if standard.value_unit != value_unit:
        raise Invalid(
            f"reference standard {standard.name} states its uncertainty in "
            f"{standard.value_unit}; this unit's values are in {value_unit}",
            field="reference_standard",
        )
    if given_u is not None and not _same(given_u, standard.expanded_u):
        raise Invalid(
            f"reference_expanded_u {given_u:g} differs from the register's U of "
            f"{standard.name} ({standard.expanded_u:g} {standard.value_unit}): leave it out, "
            "the register's is used",
            field="reference_expanded_u",
        )
    if given_k is not None and not _same(given_k, standard.k):
        raise Invalid(
            f"reference_k {given_k:g} differs from the register's k of {standard.name} "
            f"({standard.k:g}): leave it out, the register's is used",
            field="reference_k",
        )
    return Named(standard, problem_on(standard, performed_at))


def _same(a: float, b: float) -> bool:
    return abs(a - b) <= 1e-9 * max(abs(a), abs(b))
