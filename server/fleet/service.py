"""Sensor types and units: create, look up, list. Services flush, never commit."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from datetime import date, datetime
from functools import cache
from typing import Any

import numpy as np
from sqlalchemy import Row, Select, and_, bindparam, func, select
from sqlalchemy.orm import Session, aliased, selectinload

import shared
from server.audit import service as audit
from server.calibrations.models import (
    CalibrationSession,
    FitRecord,
    latest_session,
    stored_fit,
    valid_sessions,
)
from server.errors import Conflict, Invalid, NotFound
from server.flags.models import Flag, FlagKind
from server.fleet.models import SensorType, Unit, UnitStatus
from server.fleet.schemas import (
    SensorTypeCreate,
    SensorTypeUpdate,
    UnitCreate,
    UnitRead,
    UnitUpdate,
)
from server.pagination import PageParams
from shared.drift import compare
from shared.fleet import DueDate, due_date

COMPARE_POINTS = 201  # readings on which a later curve is compared with the first
COMPARE_DRAWS = 100  # the significance is not used here: the fewest draws compare() accepts


def check_family_choice(
    families: list[str], options: dict[str, dict[str, Any]]
) -> dict[str, dict[str, Any]]:
    """Every family exists and its options are valid; returns the options with defaults."""
    checked: dict[str, dict[str, Any]] = {}
    for i, name in enumerate(families):
        if name not in shared.FAMILIES:
            raise Invalid(
                f"unknown family {name!r}; the catalog has: {', '.join(sorted(shared.FAMILIES))}",
                field=f"families.{i}",
            )
        try:
            checked[name] = shared.get_family(name).check_options(options.get(name, {}))
        except shared.BadInput as exc:
            raise Invalid(str(exc), field=f"family_options.{name}") from exc
    stray = sorted(set(options) - set(families))
    if stray:
        raise Invalid(
            f"options given for families not listed: {', '.join(stray)}", field="family_options"
        )
    return checked


def create_sensor_type(
    session: Session, data: SensorTypeCreate, actor: str | None = None
) -> SensorType:
    if session.scalar(select(SensorType).where(SensorType.name == data.name)) is not None:
        raise Conflict(f"sensor type {data.name!r} exists already", field="name")
    if len(set(data.families)) != len(data.families):
        raise Invalid("a family is listed twice", field="families")
    options = check_family_choice(data.families, data.family_options)
    sensor_type = SensorType(**data.model_dump(exclude={"family_options"}), family_options=options)
    session.add(sensor_type)
    session.flush()
    audit.record(
        session,
        actor,
        "sensor_type.created",
        "sensor_type",
        sensor_type.name,
        f"sensor type {sensor_type.name} created",
        settings=data.model_dump(),
    )
    return sensor_type


REFIT_FIELDS = (  # a change to one of these changes fits or decisions: refit the type
    "families",
    "family_options",
    "noise_in",
    "tolerance_abs",
    "tolerance_rel",
    "tur",
    "reading_resolution",
    "decision_rule",
    "guard_multiple",
)
RECOMPUTE_FIELDS = ("drift_limit_abs", "interval_days")  # flags and due dates only


@dataclass(frozen=True, slots=True)
class TypeChange:
    """What an edit changed: {field: (before, after)}; whether the type needs a refit, or only
    its flags recomputed."""

    changed: dict[str, tuple[Any, Any]]

    @property
    def needs_refit(self) -> bool:
        return any(name in self.changed for name in REFIT_FIELDS)

    @property
    def needs_recompute(self) -> bool:
        return any(name in self.changed for name in RECOMPUTE_FIELDS)

    def describe(self) -> str:
        """The change in words, e.g. "tolerance_abs 3 -> 2; families [...] -> [...]"."""
        return "; ".join(f"{k} {v[0]!r} -> {v[1]!r}" for k, v in self.changed.items())


def update_sensor_type(
    session: Session, sensor_type: SensorType, data: SensorTypeUpdate, actor: str | None = None
) -> TypeChange:
    """Apply the fields given; checks the result as a whole (families and their options, a
    tolerance left). Refitting and recomputing are the caller's, from the returned change."""
    given = data.model_dump(exclude_unset=True)
    families = given.get("families", sensor_type.families)
    if len(set(families)) != len(families):
        raise Invalid("a family is listed twice", field="families")
    if "families" in given and "family_options" not in given:
        kept = {k: v for k, v in sensor_type.family_options.items() if k in families}
        options = check_family_choice(families, kept)
    else:
        options = check_family_choice(families, given.get("family_options", {}))
    given["families"], given["family_options"] = list(families), options
    tol_abs = given.get("tolerance_abs", sensor_type.tolerance_abs)
    tol_rel = given.get("tolerance_rel", sensor_type.tolerance_rel)
    if not (tol_abs or tol_rel):
        raise Invalid("a type needs tolerance_abs and/or tolerance_rel", field="tolerance_abs")
    changed: dict[str, tuple[Any, Any]] = {}
    for name, value in given.items():
        before = getattr(sensor_type, name)
        if before != value:
            changed[name] = (before, value)
            setattr(sensor_type, name, value)
    session.flush()
    change = TypeChange(changed)
    if changed:
        audit.record(
            session,
            actor,
            "sensor_type.updated",
            "sensor_type",
            sensor_type.name,
            f"sensor type {sensor_type.name}: {change.describe()}",
            changed={k: {"before": v[0], "after": v[1]} for k, v in changed.items()},
        )
    return change


def list_sensor_types(session: Session) -> list[SensorType]:
    return list(session.scalars(select(SensorType).order_by(SensorType.name)))


def get_sensor_type(session: Session, name: str, *, field: str | None = None) -> SensorType:
    found = session.scalar(select(SensorType).where(SensorType.name == name))
    if found is None:
        raise NotFound(f"sensor type {name!r} not found", field=field)
    return found


def create_unit(session: Session, data: UnitCreate, actor: str | None = None) -> Unit:
    sensor_type = get_sensor_type(session, data.sensor_type, field="sensor_type")
    same = find_unit_by_serial(session, data.serial)  # ignoring case, as a scanner looks up
    if same is not None:
        detail = "" if same.serial == data.serial else f" as {same.serial!r}"
        raise Conflict(f"unit {data.serial!r} exists already{detail}", field="serial")
    unit = Unit(
        serial=data.serial,
        sensor_type=sensor_type,
        received_on=data.received_on,
        notes=data.notes,
        status=UnitStatus.in_stock,
    )
    session.add(unit)
    session.flush()
    audit.record(
        session,
        actor,
        "unit.registered",
        "unit",
        unit.serial,
        f"{unit.serial} registered ({sensor_type.name})",
        received_on=unit.received_on,
        notes=unit.notes,
    )
    return unit


def update_unit(
    session: Session, unit: Unit, data: UnitUpdate, actor: str | None = None
) -> list[str]:
    """Apply the fields given; the names of those that changed. An installed unit is removed
    (an installation event) before it is quarantined or retired."""
    given = data.model_dump(exclude_unset=True)
    if given.get("status", unit.status) != unit.status and unit.status is UnitStatus.installed:
        raise Invalid(
            f"{unit.serial} is installed in {unit.installed_in or 'an instrument'}; "
            "record its removal first",
            field="status",
        )
    if "notes" in given:
        given["notes"] = (given["notes"] or "").strip() or None
    changed = {
        name: {"before": getattr(unit, name), "after": value}
        for name, value in given.items()
        if getattr(unit, name) != value
    }
    for name in changed:
        setattr(unit, name, given[name])
    session.flush()
    if changed:
        words = "; ".join(f"{k} {v['before']} -> {v['after']}" for k, v in changed.items())
        audit.record(
            session,
            actor,
            "unit.updated",
            "unit",
            unit.serial,
            f"{unit.serial}: {words}",
            changed=changed,
        )
    return list(changed)


def _with_history() -> tuple[Any, ...]:
    return (
        selectinload(Unit.sensor_type),
        selectinload(Unit.sessions).selectinload(CalibrationSession.fits),
    )


def get_unit(session: Session, serial: str, *, lock: bool = False) -> Unit:
    """The unit with its type, sessions and fits loaded (pages that draw its history);
    ``lock``: row-locked until the transaction ends (PostgreSQL; a SQLite writer holds the
    whole database), so two changes of one unit take turns. FOR NO KEY UPDATE: it does not
    block the KEY SHARE lock of a row added that refers to the unit (a flag raised by a failed
    check of a reference standard, which the save may be waiting for: see
    tests/server/test_standard_locks.py)."""
    query = select(Unit).where(Unit.serial == serial).options(*_with_history())
    unit = session.scalar(query.with_for_update(of=Unit, key_share=True) if lock else query)
    if unit is None:
        raise NotFound(f"unit {serial!r} not found")
    return unit


@dataclass(frozen=True, slots=True)
class UnitRow:
    """A unit as lists and lookups show it: its id (to join more to it) and its summary."""

    id: int
    read: UnitRead


@cache
def _summary_columns() -> tuple[Any, ...]:
    """The columns of ``UnitRead`` (labelled with its field names) and the unit's id: the unit's
    own, its type's name, its calibration count (not voided), and the time and decision of its
    latest valid session (not voided, with a current fit; latest by performed_at then id, as
    ``latest_session``) as correlated subqueries on the unit's own sessions (their unit_id
    index). Built once: building the aliased subqueries costs milliseconds, running them less."""
    counted = aliased(CalibrationSession)
    newest = aliased(CalibrationSession)
    newest_fit = aliased(FitRecord)
    count = (
        select(func.count(counted.id))
        .where(counted.unit_id == Unit.id, counted.voided_at.is_(None))
        .correlate(Unit)
        .scalar_subquery()
    )

    def latest(column: Any) -> Any:
        return (
            select(column)
            .select_from(newest)
            .join(newest_fit, and_(newest_fit.session_id == newest.id, newest_fit.is_current))
            .where(newest.unit_id == Unit.id, newest.voided_at.is_(None))
            .order_by(newest.performed_at.desc(), newest.id.desc())
            .limit(1)
            .correlate(Unit)
            .scalar_subquery()
        )

    return (
        Unit.id,
        Unit.serial,
        SensorType.name.label("sensor_type"),
        Unit.status,
        Unit.installed_in,
        Unit.received_on,
        Unit.notes,
        count.label("calibration_count"),
        latest(newest.performed_at).label("last_calibrated_at"),
        latest(newest_fit.passed).label("last_passed"),
        Unit.due_on,
        Unit.due_basis,
    )


def _summaries() -> Select[Any]:
    """Units' summaries (``_summary_columns``); add the WHERE and ORDER BY."""
    return select(*_summary_columns()).join_from(
        Unit, SensorType, SensorType.id == Unit.sensor_type_id
    )


@cache
def _lookup() -> Select[Any]:
    return _summaries().where(Unit.serial == bindparam("serial"))


def _row(session: Session, found: Row[Any]) -> UnitRow:
    fields = dict(found._mapping)
    unit_id = fields.pop("id")
    if fields["due_on"] is None and fields["last_calibrated_at"] is not None:
        # never stored (a database from before revision 0004, until its start stores it)
        unit = session.get(Unit, unit_id)
        if unit is not None:
            fields["due_on"], fields["due_basis"] = _stored_or_computed(unit)
    # the columns are typed (enum, UTC datetimes, booleans) by their SQLAlchemy types already:
    # building the model without validating it again halves the cost of a page of rows
    return UnitRow(id=unit_id, read=UnitRead.model_construct(**fields))


def get_unit_read(session: Session, serial: str) -> UnitRead:
    """The unit's summary in one query, without loading its sessions or fits."""
    found = session.execute(_lookup(), {"serial": serial}).one_or_none()
    if found is None:
        raise NotFound(f"unit {serial!r} not found")
    return _row(session, found).read


def list_units(
    session: Session,
    page: PageParams,
    *,
    sensor_type: str | None = None,
    status: UnitStatus | None = None,
    q: str | None = None,
    flag: str | None = None,
) -> tuple[list[UnitRow], int]:
    """Units ordered by serial, filtered, one page of their summaries and how many match in all;
    ``q`` matches part of the serial (any case); ``flag`` a flag kind (or "any") the unit has
    open. Two queries, whatever the page size."""
    query = select(Unit)
    if sensor_type:
        query = query.where(
            Unit.sensor_type_id.in_(select(SensorType.id).where(SensorType.name == sensor_type))
        )
    if status:
        query = query.where(Unit.status == status)
    if flag:
        flagged = select(Flag.unit_id).where(Flag.open.is_(True))
        if flag != "any":
            flagged = flagged.where(Flag.kind == FlagKind(flag))
        query = query.where(Unit.id.in_(flagged))
    if q and q.strip():
        pattern = "%" + q.strip().lower().replace("%", r"\%").replace("_", r"\_") + "%"
        query = query.where(func.lower(Unit.serial).like(pattern, escape="\\"))
    counted = query.with_only_columns(Unit.id).subquery()
    total = session.scalar(select(func.count()).select_from(counted)) or 0
    # the page's ids first, so that the summaries are computed for its rows alone (a deep
    # OFFSET would otherwise compute them for every row it skips)
    ids = query.with_only_columns(Unit.id).order_by(Unit.serial)
    ids = ids.offset(page.offset).limit(page.per_page)
    rows = session.execute(_summaries().where(Unit.id.in_(ids)).order_by(Unit.serial))
    return [_row(session, found) for found in rows], total


def find_unit_by_serial(session: Session, serial: str) -> Unit | None:
    """Exact serial match, ignoring case and surrounding blanks (a scanner's input)."""
    return session.scalar(select(Unit).where(func.lower(Unit.serial) == serial.strip().lower()))


def _valid(unit: Unit) -> list[CalibrationSession]:
    """Sessions that count (not voided, with a current fit), oldest first; on a day with more
    than one, the last of the day."""
    by_day = {s.performed_at.date(): s for s in valid_sessions(unit.sessions)}
    return list(by_day.values())


@dataclass(frozen=True, slots=True)
class DriftPoint:
    """One valid calibration of a unit against the unit's first one (value units).

    ``deviation`` is the signed later - first difference where |later - first| is largest over
    their common valid range (0 for the first calibration), at reading ``at_reading``, where the
    later curve's value is ``at_value``. ``band`` is the half-width of the simultaneous band of the
    difference at that reading (``shared.drift.compare``'s ``band``; its critical value comes from
    only ``COMPARE_DRAWS`` draws, so it is approximate). The three are None for the first one.
    """

    on: date
    session_id: int
    deviation: float
    at_reading: float | None = None
    at_value: float | None = None
    band: float | None = None


class NotComparable(Exception):
    """A later calibration cannot be compared with the unit's first one."""

    def __init__(self, performed_at: datetime) -> None:
        self.performed_at = performed_at
        super().__init__(
            f"the calibration of {performed_at:%Y-%m-%d} cannot be compared with the "
            "first one (no common valid range)"
        )


def drift_history(unit: Unit) -> list[DriftPoint]:
    """The unit's cumulative drift history: its valid calibrations (see ``_valid``), oldest first.

    The first one at deviation 0, then each later one's ``shared.drift.compare(first, later)``
    largest deviation. Empty without a calibration. Raises ``NotComparable`` when a later curve
    shares no valid range with the first one. Tens of ms per later calibration.
    """
    valid = _valid(unit)
    if not valid:
        return []
    first = stored_fit(valid[0])
    history = [DriftPoint(on=valid[0].performed_at.date(), session_id=valid[0].id, deviation=0.0)]
    for record in valid[1:]:
        try:
            found = compare(first, stored_fit(record), points=COMPARE_POINTS, draws=COMPARE_DRAWS)
        except shared.CalibrationError as exc:
            raise NotComparable(record.performed_at) from exc
        i = int(np.argmax(np.abs(found.deviation)))  # the grid point of max_deviation
        history.append(
            DriftPoint(
                on=record.performed_at.date(),
                session_id=record.id,
                deviation=found.max_deviation,
                at_reading=found.at_reading,
                at_value=found.at_value,
                band=float(found.band[i]),
            )
        )
    return history


def unit_due(unit: Unit, *, history: list[DriftPoint] | None = None) -> DueDate | None:
    """THE due date of a unit: ``shared.fleet.due_date`` on its cumulative drift history.

    The history (``drift_history``) is the first valid calibration at deviation 0, then each later
    one's largest |deviation| from the first one's curve over their common valid range
    (``shared.drift.compare(first, later).max_deviation``). The threshold is the type's drift
    limit or tolerance (tolerance_abs + tolerance_rel % of the value where the newest deviation
    is largest), whichever is smaller. With one calibration, no tolerance or drift limit, or two
    curves that cannot be compared, the type's interval alone. None without a calibration.
    ``history`` is that history when the caller has it already (it is not recomputed).

    It compares curves (tens of ms each): pages read the stored ``Unit.due_on``/``due_basis``
    through ``due_on``/``due_basis``, which flag recomputation keeps current via ``store_due``.
    """
    valid = _valid(unit)
    if not valid:
        return None
    st = unit.sensor_type
    last = valid[-1].performed_at.date()
    interval = st.interval_days

    def interval_only(why: str) -> DueDate:
        found = due_date(last, interval, [], 1.0)
        return dataclasses.replace(found, basis=f"interval only ({interval} days): {why}")

    if len(valid) < 2:
        return due_date(last, interval, [(last, 0.0)], 1.0)
    if not (st.tolerance_abs or st.tolerance_rel or st.drift_limit_abs):
        return interval_only("the type has no tolerance or drift limit to project drift against")
    try:
        points = drift_history(unit) if history is None else history
    except NotComparable as exc:
        return interval_only(str(exc))
    at_value = points[-1].at_value or 0.0
    tolerance = (st.tolerance_abs or 0.0) + (st.tolerance_rel or 0.0) / 100.0 * abs(at_value)
    if tolerance <= 0:
        tolerance = float(st.drift_limit_abs or 0.0)
    return due_date(
        last,
        interval,
        [(p.on, abs(p.deviation)) for p in points],
        tolerance,
        drift_limit=st.drift_limit_abs or None,
        unit=st.value_unit,
    )


def store_due(unit: Unit) -> DueDate | None:
    """Compute the unit's due date and keep it on the unit (flag recomputation calls this)."""
    found = unit_due(unit)
    unit.due_on = found.due if found else None
    unit.due_basis = found.basis if found else None
    return found


def _stored_or_computed(unit: Unit) -> tuple[date | None, str | None]:
    if unit.due_on is not None or latest_session(unit.sessions) is None:
        return unit.due_on, unit.due_basis
    found = unit_due(unit)  # never recomputed since the migration: compute (costly, correct)
    return (found.due, found.basis) if found else (None, None)


def due_on(unit: Unit) -> date | None:
    """The unit's due date (see ``unit_due``)."""
    return _stored_or_computed(unit)[0]


def due_basis(unit: Unit) -> str | None:
    """Why the unit is due then (see ``unit_due``)."""
    return _stored_or_computed(unit)[1]
