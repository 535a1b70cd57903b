"""Sensor types and units: create, look up, list. Services flush, never commit."""

from __future__ import annotations

from datetime import date, timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

import shared
from server.calibrations.models import CalibrationSession, latest_session
from server.errors import Conflict, Invalid, NotFound
from server.fleet.models import SensorType, Unit, UnitStatus
from server.fleet.schemas import SensorTypeCreate, UnitCreate, UnitRead
from server.pagination import PageParams


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


def due_on(unit: Unit) -> date | None:
    last = latest_session(unit.sessions)
    if last is None:
        return None
    return last.performed_at.date() + timedelta(days=unit.sensor_type.interval_days)


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
    )
