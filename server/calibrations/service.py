"""Run a calibration: store the session and its points, fit server-side, judge, keep the fit."""

from __future__ import annotations

from collections import defaultdict
from typing import Any

import numpy as np

import shared
from server.calibrations.models import CalibrationSession, FitRecord, Point, latest_session
from server.calibrations.schemas import (
    CalibrationCreate,
    CalibrationRead,
    CurrentCalibrationRead,
    DecisionRead,
    FitRead,
    PointIn,
    PointRead,
)
from server.errors import Invalid, NotFound
from server.fleet.models import SensorType, Unit
from server.fleet.service import due_on


def choose_family(sensor_type: SensorType, family: str | None) -> tuple[str, dict[str, Any]]:
    name = family or sensor_type.families[0]
    if name not in sensor_type.families:
        raise Invalid(
            f"{sensor_type.name} units are fitted with "
            f"{', '.join(sensor_type.families)}; not {name!r}",
            field="family",
        )
    return name, dict(sensor_type.family_options.get(name, {}))


def fit_points(
    sensor_type: SensorType, points: list[PointIn], family: str | None
) -> tuple[shared.Fit, shared.Decision]:
    """Fit and judge points without storing anything (the live preview uses this too)."""
    name, options = choose_family(sensor_type, family)
    exclude = {}
    for i, p in enumerate(points):
        if p.excluded:
            if not (p.exclude_reason and p.exclude_reason.strip()):
                raise Invalid(
                    "an excluded point needs a reason", field=f"points.{i}.exclude_reason"
                )
            exclude[i] = p.exclude_reason.strip()
    try:
        result = shared.fit(
            name,
            [p.reading for p in points],
            [p.reference_value for p in points],
            exclude=exclude,
            **options,
        )
    except shared.CalibrationError as exc:
        raise Invalid(f"cannot fit {name}: {exc}", field="points") from exc
    decision = shared.decide(
        result,
        sensor_type.tolerance_abs,
        sensor_type.tolerance_rel,
        tur=sensor_type.tur,
        unit=sensor_type.value_unit,
    )
    return result, decision


def repeat_indices(values: list[float]) -> list[int]:
    """0, 1, 2... for each repeated reading at the same reference value, in entry order."""
    seen: dict[float, int] = defaultdict(int)
    out = []
    for v in values:
        out.append(seen[v])
        seen[v] += 1
    return out


def run_calibration(
    session: Any, unit: Unit, data: CalibrationCreate, recorded_by: str | None
) -> CalibrationSession:
    result, decision = fit_points(unit.sensor_type, data.points, data.family)
    record = CalibrationSession(
        unit=unit,
        performed_at=data.performed_at,
        operator=data.operator,
        reference=data.reference,
        kind=data.kind,
        ambient=data.ambient,
        notes=data.notes,
        recorded_by=recorded_by,
    )
    repeats = repeat_indices([p.reference_value for p in data.points])
    record.points = [
        Point(
            seq=i,
            reference_value=p.reference_value,
            reading=p.reading,
            repeat_index=repeats[i],
            excluded=p.excluded,
            exclude_reason=p.exclude_reason.strip() if p.excluded and p.exclude_reason else None,
        )
        for i, p in enumerate(data.points)
    ]
    record.fits = [
        FitRecord(
            family=result.family,
            options=dict(result.options),
            result=result.to_dict(),
            decision=decision.to_dict(),
            passed=decision.passed,
            is_current=True,
            engine_version=result.engine_version,
        )
    ]
    session.add(record)
    session.flush()
    return record


def fit_of(record: CalibrationSession) -> tuple[shared.Fit, FitRecord]:
    current = record.current_fit
    if current is None:
        raise NotFound(f"calibration {record.id} has no current fit")
    return shared.Fit.from_dict(current.result), current


def calibration_read(record: CalibrationSession) -> CalibrationRead:
    result, stored = fit_of(record)
    reasons = dict(result.excluded)
    points = [
        PointRead(
            reference_value=p.reference_value,
            reading=p.reading,
            repeat_index=p.repeat_index,
            used=bool(result.used[i]),
            excluded_reason=reasons.get(i),
            residual=float(result.residuals[i]),
        )
        for i, p in enumerate(record.points)
    ]
    fit = FitRead(
        family=result.family,
        formula=shared.get_family(result.family).formula,
        options=dict(result.options),
        params=dict(result.params),
        stderr=result.stderr,
        covariance=np.asarray(result.covariance).tolist(),
        rse=result.rse,
        dof=result.dof,
        sigma_source=result.sigma_source,
        valid_range=result.valid_range,
        monotone=result.monotone,
        engine_version=result.engine_version,
        fitted_at=stored.created_at,
    )
    return CalibrationRead(
        id=record.id,
        unit=record.unit.serial,
        sensor_type=record.unit.sensor_type.name,
        performed_at=record.performed_at,
        operator=record.operator,
        reference=record.reference,
        kind=record.kind,
        ambient=record.ambient,
        notes=record.notes,
        recorded_by=record.recorded_by,
        voided=record.voided_at is not None,
        points=points,
        fit=fit,
        decision=DecisionRead(**stored.decision),
    )


def current_calibration(unit: Unit) -> CurrentCalibrationRead:
    last = latest_session(unit.sessions)
    if last is None:
        raise NotFound(f"unit {unit.serial!r} has no calibration yet")
    return CurrentCalibrationRead(
        unit=unit.serial, due_on=due_on(unit), calibration=calibration_read(last)
    )
