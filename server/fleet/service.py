"""Sensor types and units: create, look up, list. Services flush, never commit."""

from __future__ import annotations

import dataclasses
from datetime import date
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

import shared
from server.calibrations.models import (
    CalibrationSession,
    latest_session,
    stored_fit,
    valid_sessions,
)
from server.errors import Conflict, Invalid, NotFound
from server.fleet.models import SensorType, Unit, UnitStatus
from server.fleet.schemas import SensorTypeCreate, UnitCreate, UnitRead
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


def create_sensor_type(session: Session, data: SensorTypeCreate) -> SensorType:
    if session.scalar(select(SensorType).where(SensorType.name == data.name)) is not None:
        raise Conflict(f"sensor type {data.name!r} exists already", field="name")
    if len(set(data.families)) != len(data.families):
        raise Invalid("a family is listed twice", field="families")
    options = check_family_choice(data.families, data.family_options)
    sensor_type = SensorType(**data.model_dump(exclude={"family_options"}), family_options=options)
    session.add(sensor_type)
    session.flush()
    return sensor_type


def list_sensor_types(session: Session) -> list[SensorType]:
    return list(session.scalars(select(SensorType).order_by(SensorType.name)))


def get_sensor_type(session: Session, name: str, *, field: str | None = None) -> SensorType:
    found = session.scalar(select(SensorType).where(SensorType.name == name))
    if found is None:
        raise NotFound(f"sensor type {name!r} not found", field=field)
    return found


def create_unit(session: Session, data: UnitCreate) -> Unit:
    sensor_type = get_sensor_type(session, data.sensor_type, field="sensor_type")
    if session.scalar(select(Unit).where(Unit.serial == data.serial)) is not None:
        raise Conflict(f"unit {data.serial!r} exists already", field="serial")
    unit = Unit(
        serial=data.serial,
        sensor_type=sensor_type,
        received_on=data.received_on,
        notes=data.notes,
        status=UnitStatus.in_stock,
    )
    session.add(unit)
    session.flush()
    return unit


def _with_history() -> tuple[Any, ...]:
    return (
        selectinload(Unit.sensor_type),
        selectinload(Unit.sessions).selectinload(CalibrationSession.fits),
    )


def get_unit(session: Session, serial: str) -> Unit:
    unit = session.scalar(select(Unit).where(Unit.serial == serial).options(*_with_history()))
    if unit is None:
        raise NotFound(f"unit {serial!r} not found")
    return unit


def list_units(
    session: Session,
    page: PageParams,
    *,
    sensor_type: str | None = None,
    status: UnitStatus | None = None,
    q: str | None = None,
) -> tuple[list[Unit], int]:
    """Units ordered by serial, filtered; ``q`` matches part of the serial (any case)."""
    query = select(Unit)
    if sensor_type:
        query = query.join(Unit.sensor_type).where(SensorType.name == sensor_type)
    if status:
        query = query.where(Unit.status == status)
    if q and q.strip():
        pattern = "%" + q.strip().lower().replace("%", r"\%").replace("_", r"\_") + "%"
        query = query.where(func.lower(Unit.serial).like(pattern, escape="\\"))
    total = session.scalar(select(func.count()).select_from(query.subquery())) or 0
    units = session.scalars(
        query.options(*_with_history())
        .order_by(Unit.serial)
        .offset(page.offset)
        .limit(page.per_page)
    )
    return list(units), total


def find_unit_by_serial(session: Session, serial: str) -> Unit | None:
    """Exact serial match, ignoring case and surrounding blanks (a scanner's input)."""
    return session.scalar(select(Unit).where(func.lower(Unit.serial) == serial.strip().lower()))


def _valid(unit: Unit) -> list[CalibrationSession]:
    """Sessions that count (not voided, with a current fit), oldest first; on a day with more
    than one, the last of the day."""
    by_day = {s.performed_at.date(): s for s in valid_sessions(unit.sessions)}
    return list(by_day.values())


def unit_due(unit: Unit) -> DueDate | None:
    """THE due date of a unit: ``shared.fleet.due_date`` on its cumulative drift history.

    The history is the first valid calibration at deviation 0, then each later one's largest
    |deviation| from the first one's curve over their common valid range
    (``shared.drift.compare(first, later).max_deviation``). The threshold is the type's drift
    limit or tolerance (tolerance_abs + tolerance_rel % of the value where the newest deviation
    is largest), whichever is smaller. With one calibration, no tolerance or drift limit, or two
    curves that cannot be compared, the type's interval alone. None without a calibration.

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
    first = stored_fit(valid[0])
    history = [(valid[0].performed_at.date(), 0.0)]
    at_value = 0.0
    for record in valid[1:]:
        try:
            found = compare(first, stored_fit(record), points=COMPARE_POINTS, draws=COMPARE_DRAWS)
        except shared.CalibrationError:
            return interval_only(
                f"the calibration of {record.performed_at:%Y-%m-%d} cannot be compared with the "
                "first one (no common valid range)"
            )
        history.append((record.performed_at.date(), abs(found.max_deviation)))
        at_value = found.at_value
    tolerance = (st.tolerance_abs or 0.0) + (st.tolerance_rel or 0.0) / 100.0 * abs(at_value)
    if tolerance <= 0:
        tolerance = float(st.drift_limit_abs or 0.0)
    return due_date(
        last,
        interval,
        history,
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


def unit_read(unit: Unit) -> UnitRead:
    last = latest_session(unit.sessions)
    fit = last.current_fit if last else None
    return UnitRead(
        serial=unit.serial,
        sensor_type=unit.sensor_type.name,
        status=unit.status,
        installed_in=unit.installed_in,
        received_on=unit.received_on,
        notes=unit.notes,
        calibration_count=sum(1 for s in unit.sessions if s.voided_at is None),
        last_calibrated_at=last.performed_at if last else None,
        last_passed=fit.passed if fit else None,
        due_on=due_on(unit),
        due_basis=due_basis(unit),
    )
