"""The conditions a flag stands for, found from a unit's stored calibrations and installation
events (``find_conditions``); ``server.flags.service`` stores them as flags. See that module's
docstring for each kind and its severity."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

import shared
from server.calibrations.models import CalibrationSession, stored_fit, valid_sessions
from server.db import json_safe, utcnow
from server.flags.fleet import keep_curve
from server.flags.models import EventKind, FlagKind, InstallationEvent, Severity
from server.fleet.models import SensorType, Unit, UnitStatus
from server.fleet.service import store_due
from shared.drift import as_found, compare, could_drift

PLOT_POINTS = 41  # readings kept in a drift flag's evidence for its plot
OVERDUE_ACTION_DAYS = 30  # overdue longer than this is an action, before it a warning


@dataclass(frozen=True, slots=True)
class Found:
    """A condition found by a recomputation, before it is stored."""

    unit: Unit
    kind: FlagKind
    severity: Severity
    key: str
    message: str
    evidence: dict[str, Any]


def _g(x: float, digits: int = 3) -> str:
    return f"{x:.{digits}g}"


def _compact(values: Any, n: int = PLOT_POINTS) -> list[float]:
    arr = np.asarray(values, dtype=float)
    if arr.size <= n:
        return [float(v) for v in arr]
    idx = np.unique(np.linspace(0, arr.size - 1, n).round().astype(int))
    return [float(v) for v in arr[idx]]


def installations_between(
    unit: Unit, events: list[InstallationEvent], start: datetime, end: datetime
) -> list[dict[str, Any]]:
    """Where the unit was installed between ``start`` and ``end``: one entry per stint that
    overlaps the interval, {location, from, to} (ISO datetimes; None for an open end). Without any
    recorded event, the unit record's installed-in (if any) is given, marked as such."""
    if not events:
        if unit.installed_in:
            return [
                {
                    "location": unit.installed_in,
                    "from": None,
                    "to": None,
                    "source": "from the unit record; no installation events recorded",
                }
            ]
        return []
    stints: list[dict[str, Any]] = []
    where: str | None = None
    since: datetime | None = None
    for e in sorted(events, key=lambda e: (e.at, e.id)):
        if e.kind is EventKind.installed:
            where, since = e.location, e.at
        elif where is not None:
            stints.append({"location": where, "from": since, "to": e.at})
            where, since = None, None
    if where is not None:
        stints.append({"location": where, "from": since, "to": None})
    overlapping = [
        s
        for s in stints
        if (s["from"] is None or s["from"] < end) and (s["to"] is None or s["to"] > start)
    ]
    return [
        {
            "location": s["location"],
            "from": s["from"].isoformat() if s["from"] else None,
            "to": s["to"].isoformat() if s["to"] else None,
            "source": "installation events",
        }
        for s in overlapping
    ]


# -- the conditions --------------------------------------------------------------------------------


def _failed(unit: Unit, last: CalibrationSession, st: SensorType) -> Found | None:
    stored = last.current_fit
    if stored is None or stored.passed:
        return None
    vu = st.value_unit
    fit = stored_fit(last)
    used = np.asarray(fit.used, dtype=bool)
    value = np.asarray(fit.value)[used]
    allowed_each = (st.tolerance_abs or 0.0) + (st.tolerance_rel or 0.0) / 100.0 * np.abs(value)
    d = stored.decision
    worst, allowed = d.get("worst_error"), d.get("allowed_at_worst")
    reasons = [str(r) for r in d.get("reasons") or []]
    detail = f": {'; '.join(reasons)}" if reasons else ""
    used_pct = d.get("tolerance_used_pct")
    if used_pct is None and isinstance(worst, int | float) and isinstance(allowed, int | float):
        used_pct = 100.0 * abs(worst) / allowed if allowed > 0 else None  # stored before 0009
    if not reasons and isinstance(worst, int | float) and isinstance(allowed, int | float):
        detail += f" (worst error {_g(worst)} {vu}, allowed ±{_g(allowed)} {vu})"
    return Found(
        unit=unit,
        kind=FlagKind.failed_acceptance,
        severity=Severity.action,
        key=f"failed_acceptance:{unit.id}:{last.id}",
        message=f"current calibration of {last.performed_at:%Y-%m-%d} failed acceptance{detail}",
        evidence=json_safe(
            {
                "session_id": last.id,
                "performed_at": last.performed_at,
                "worst_error": worst,
                "worst_error_at": d.get("worst_error_at"),
                "allowed_at_worst": allowed,
                "tolerance_used_pct": used_pct,
                "tur_achieved": d.get("tur_achieved"),
                "tur_required": d.get("tur_required"),
                "reasons": d.get("reasons", []),
                "rule": d.get("rule"),
                "value_unit": vu,
                "points": {
                    "value": value,
                    "error": np.asarray(fit.residuals)[used],
                    "allowed": allowed_each,
                },
            }
        ),
    )


def _drift(
    unit: Unit, prev: CalibrationSession, cur: CalibrationSession, st: SensorType
) -> Found | None:
    vu, ru = st.value_unit, st.reading_unit
    before, after = stored_fit(prev), stored_fit(cur)
    try:
        # most units did not drift, and most of those are told without compare's simulation
        if not could_drift(before, after, drift_limit=st.drift_limit_abs):
            return None
        found = compare(before, after, drift_limit=st.drift_limit_abs, unit=vu)
    except shared.CalibrationError:
        return None  # ranges do not overlap: nothing to compare
    if not found.drifted:
        return None
    limit = f"limit {_g(found.drift_limit)} {vu}, " if found.drift_limit is not None else ""
    message = (
        f"drifted {found.max_deviation:+.3g} {vu} at {_g(found.at_reading, 4)} {ru} between "
        f"{prev.performed_at:%Y-%m-%d} and {cur.performed_at:%Y-%m-%d} ({limit}"
        f"En {found.en_at_max:.2g}, z {found.z_simultaneous:.3g} > critical {found.critical:.3g})"
    )
    return Found(
        unit=unit,
        kind=FlagKind.drift,
        severity=Severity.action,
        key=f"drift:{unit.id}:{prev.id}:{cur.id}",
        message=message,
        evidence=json_safe(
            {
                **_between(prev, cur),
                "max_deviation": found.max_deviation,
                "at_reading": found.at_reading,
                "at_value": found.at_value,
                "en_at_max": found.en_at_max,
                "z_simultaneous": found.z_simultaneous,
                "critical": found.critical,
                "level": found.level,
                "drift_limit": found.drift_limit,
                "common_range": list(found.common_range),
                "rule": found.rule,
                "value_unit": vu,
                "reading_unit": ru,
                "grid": {
                    "reading": _compact(found.reading),
                    "deviation": _compact(found.deviation),
                    "band": _compact(found.band),
                },
            }
        ),
    )


def _between(prev: CalibrationSession, cur: CalibrationSession) -> dict[str, object]:
    """The two sessions a drift or as-found flag compares, for its evidence."""
    return {
        "previous_session_id": prev.id,
        "previous_at": prev.performed_at,
        "current_session_id": cur.id,
        "current_at": cur.performed_at,
    }


def _out_in_service(
    unit: Unit,
    prev: CalibrationSession,
    cur: CalibrationSession,
    st: SensorType,
    events: list[InstallationEvent],
) -> Found | None:
    if not (st.tolerance_abs or st.tolerance_rel):
        return None
    vu = st.value_unit
    used = stored_fit(cur).used  # the points the new calibration used (not fold-back, not excluded)
    points = [p for i, p in enumerate(cur.points) if i < len(used) and bool(used[i])]
    try:
        found = as_found(
            stored_fit(prev),
            [p.reading for p in points],
            [p.reference_value for p in points],
            st.tolerance_abs,
            st.tolerance_rel,
            unit=vu,
        )
    except shared.CalibrationError:
        return None
    if found.in_tolerance:
        return None
    places = installations_between(unit, events, prev.performed_at, cur.performed_at)
    where = (
        "installed in " + " and ".join(str(p["location"]) for p in places)
        if places
        else "no installation recorded"
    )
    message = (
        f"as found {cur.performed_at:%Y-%m-%d}, the calibration of "
        f"{prev.performed_at:%Y-%m-%d} was out of tolerance at {found.n_out} of "
        f"{found.n_judged} points, worst {found.worst_error:+.3g} {vu} at "
        f"{_g(found.worst_at_value, 4)} {vu} (allowed ±{_g(found.allowed_at_worst)} {vu}, "
        f"{found.tolerance_used_pct:.0f} % of its tolerance); "
        f"{where} in between"
    )
    return Found(
        unit=unit,
        kind=FlagKind.out_of_tolerance_in_service,
        severity=Severity.action,
        key=f"out_of_tolerance_in_service:{unit.id}:{prev.id}:{cur.id}",
        message=message,
        evidence=json_safe(
            {
                **_between(prev, cur),
                "n_judged": found.n_judged,
                "n_out": found.n_out,
                "worst_error": found.worst_error,
                "worst_at_reading": found.worst_at_reading,
                "worst_at_value": found.worst_at_value,
                "allowed_at_worst": found.allowed_at_worst,
                "tolerance_used_pct": found.tolerance_used_pct,
                "installations": places,
                "points": {
                    "value": found.value,
                    "error": found.error,
                    "allowed": found.allowed,
                },
                "rule": found.rule,
                "value_unit": vu,
                "reading_unit": st.reading_unit,
            }
        ),
    )


def _overdue(unit: Unit, last: CalibrationSession, st: SensorType, today: date) -> Found | None:
    due = store_due(unit)
    if unit.status in (UnitStatus.retired, UnitStatus.quarantined):
        return None
    if due is None or due.due >= today:
        return None
    late = (today - due.due).days
    return Found(
        unit=unit,
        kind=FlagKind.overdue,
        severity=Severity.action if late > OVERDUE_ACTION_DAYS else Severity.warning,
        key=f"overdue:{unit.id}:{last.id}",
        message=(
            f"due {due.due.isoformat()}, {late} day{'s' if late != 1 else ''} overdue "
            f"(last calibrated {last.performed_at:%Y-%m-%d}, interval {st.interval_days} days"
            f"{', shortened by drift' if due.shortened else ''})"
        ),
        evidence=json_safe(
            {
                "due": due.due,
                "days_overdue": late,
                "last_calibrated": last.performed_at,
                "interval_days": st.interval_days,
                "basis": due.basis,
                "decided_by": due.decided_by,
                "rate_per_year": due.rate_per_year,
                "threshold": due.threshold,
                "n_calibrations": due.n_calibrations,
                "value_unit": st.value_unit,
            }
        ),
    )


def _units_of(
    session: Session, sensor_type: SensorType, only: set[int] | None = None
) -> list[Unit]:
    query = select(Unit).where(Unit.sensor_type_id == sensor_type.id)
    if only is not None:
        query = query.where(Unit.id.in_(only))
    return list(
        session.scalars(
            query.options(
                selectinload(Unit.sessions).selectinload(CalibrationSession.fits),
                selectinload(Unit.sessions).selectinload(CalibrationSession.points),
            ).order_by(Unit.serial)
        )
    )


def find_conditions(
    session: Session,
    sensor_type: SensorType,
    today: date | None = None,
    only: set[int] | None = None,
) -> list[Found]:
    """Every condition of its own that holds now for each unit of ``sensor_type`` (all but the
    fleet outliers, see ``server.flags.fleet``), or with ``only`` (unit ids) for those units;
    each unit's due date and what the fleet comparison needs are stored on it on the way."""
    today = today or utcnow().date()
    chosen = _units_of(session, sensor_type, only)
    for unit in chosen:
        if unit.status is UnitStatus.retired:
            keep_curve(unit, None, sensor_type)
    units = [u for u in chosen if u.status is not UnitStatus.retired]
    events: dict[int, list[InstallationEvent]] = {u.id: [] for u in units}
    if units:
        for e in session.scalars(
            select(InstallationEvent)
            .where(InstallationEvent.unit_id.in_(events))
            .order_by(InstallationEvent.at, InstallationEvent.id)
        ):
            events[e.unit_id].append(e)
    found: list[Found] = []
    for unit in units:
        valid = valid_sessions(unit.sessions)
        if not valid:
            unit.due_on, unit.due_basis = None, None
            keep_curve(unit, None, sensor_type)
            continue
        last = valid[-1]
        keep_curve(unit, last, sensor_type)
        for item in (
            _failed(unit, last, sensor_type),
            _overdue(unit, last, sensor_type, today),
        ):
            if item is not None:
                found.append(item)
        if len(valid) >= 2:
            prev = valid[-2]
            for item in (
                _drift(unit, prev, last, sensor_type),
                _out_in_service(unit, prev, last, sensor_type, events[unit.id]),
            ):
                if item is not None:
                    found.append(item)
    return found
