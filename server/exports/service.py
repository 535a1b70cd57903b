"""Exports of a unit's current calibration: conversion table (CSV, JSON), firmware C header, and
the context of a printable calibration report. Services raise domain errors, never commit."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

import shared
from server.calibrations import charts
from server.calibrations import service as calibrations
from server.calibrations.models import CalibrationSession, latest_session
from server.errors import Invalid, NotFound
from server.fleet.models import SensorType, Unit
from server.formatting import residual_decimals
from shared.exports import (
    MAX_TABLE_ROWS,
    Table,
    c_header,
    conversion_table,
    table_to_csv,
    table_to_json,
)

REPORT_PLOT_WIDTH = 640  # px (~169 mm): fits the printable width of A4 and Letter
REPORT_PLOT_HEIGHT = 380
REPORT_RESIDUAL_HEIGHT = 300


@dataclass(frozen=True, slots=True)
class Download:
    """A file to hand over: its text, media type and the name to save it under."""

    content: str
    media_type: str
    filename: str

    @property
    def headers(self) -> dict[str, str]:
        return {"Content-Disposition": f'attachment; filename="{self.filename}"'}


def c_identifier(serial: str) -> str:
    """A C identifier from a serial: IR-2506-03 -> ir_2506_03 (a leading digit gets ``unit_``)."""
    name = re.sub(r"[^a-z0-9]+", "_", serial.lower()).strip("_")
    if not name:
        return "unit"
    return f"unit_{name}" if name[0].isdigit() else name


def file_stem(serial: str) -> str:
    """The serial as a file name: letters, digits, ``-``, ``_`` and ``.`` kept, others ``_``."""
    stem = re.sub(r"[^A-Za-z0-9._-]+", "_", serial).strip("._")
    return stem or "unit"


def current_session(unit: Unit) -> CalibrationSession:
    """The unit's current calibration (the newest not voided), or NotFound saying so."""
    current = latest_session(unit.sessions)
    if current is None:
        raise NotFound(
            f"unit {unit.serial!r} has no current calibration, so there is nothing to export"
        )
    return current


def header_problem(sensor_type: SensorType) -> str | None:
    """Why this type gets no firmware header (its reading span is not whole codes), or None."""
    lo, hi = sensor_type.reading_min, sensor_type.reading_max
    if float(lo).is_integer() and float(hi).is_integer():
        return None
    return (
        f"a firmware header converts integer reading codes, and {sensor_type.name} reads "
        f"{lo:g} to {hi:g} {sensor_type.reading_unit}, not whole codes; use the conversion "
        "table instead"
    )


DEFAULT_ROWS = 200  # at most this many rows by default when a type's readings are not whole codes


def default_step(sensor_type: SensorType) -> float:
    """Rows of a conversion table by default: every code for a span of whole codes (every 2nd,
    4th... code when there are more than ``MAX_TABLE_ROWS``, e.g. a 24-bit converter), else the
    smallest 1-2-5 step giving at most ``DEFAULT_ROWS`` rows (0.02 mV/V over 0..2.2 mV/V)."""
    if header_problem(sensor_type) is None:
        codes = float(sensor_type.reading_max) - float(sensor_type.reading_min) + 1
        return float(2 ** max(0, math.ceil(math.log2(codes / MAX_TABLE_ROWS))))
    span = float(sensor_type.reading_max) - float(sensor_type.reading_min)
    rough = span / DEFAULT_ROWS
    decade = 10.0 ** math.floor(math.log10(rough))
    factor = next(f for f in (1.0, 2.0, 5.0, 10.0) if f * decade >= rough)
    return float(f"{factor * decade:.12g}")


def _table(
    unit: Unit,
    step: float | None,
    reading_min: float | None,
    reading_max: float | None,
    level: float | None,
) -> Table:
    sensor_type = unit.sensor_type
    fit, _ = calibrations.fit_of(current_session(unit))
    lo = sensor_type.reading_min if reading_min is None else reading_min
    hi = sensor_type.reading_max if reading_max is None else reading_max
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise Invalid("reading_min and reading_max must be finite numbers", field="reading_min")
    if hi < lo:
        raise Invalid(f"reading_max {hi:g} is below reading_min {lo:g}", field="reading_max")
    step = default_step(sensor_type) if step is None else step
    try:
        return conversion_table(fit, lo, hi, step, level=level)
    except shared.BadInput as exc:
        raise Invalid(str(exc), field="step") from exc


TABLE_FORMATS = {
    "csv": (table_to_csv, "text/csv; charset=utf-8"),
    "json": (table_to_json, "application/json"),
}


def table_download(
    unit: Unit,
    fmt: str,
    step: float | None = None,
    reading_min: float | None = None,
    reading_max: float | None = None,
    level: float | None = None,
) -> Download:
    """The conversion table of the current calibration as ``fmt`` ("csv" or "json")."""
    write, media_type = TABLE_FORMATS[fmt]
    t = unit.sensor_type
    table = _table(unit, step, reading_min, reading_max, level)
    return Download(
        write(table, t.value_unit, t.reading_unit),
        media_type,
        f"{file_stem(unit.serial)}-table.{fmt}",
    )


def firmware_header(unit: Unit, lut_max_error: float | None = None) -> Download:
    """A C99 header of the current calibration; integer reading spans only (else Invalid)."""
    sensor_type = unit.sensor_type
    problem = header_problem(sensor_type)
    if problem:
        raise Invalid(problem, field="reading_span")
    record = current_session(unit)
    fit, _ = calibrations.fit_of(record)
    try:
        text = c_header(
            fit,
            name=c_identifier(unit.serial),
            unit_serial=unit.serial,
            sensor_type=sensor_type.name,
            calibrated_on=record.performed_at.date(),
            reading_min=int(sensor_type.reading_min),
            reading_max=int(sensor_type.reading_max),
            value_unit=sensor_type.value_unit,
            reading_unit=sensor_type.reading_unit,
            lut_max_error=lut_max_error,
        )
    except shared.BadInput as exc:
        raise Invalid(f"cannot write the header: {exc}", field="lut_max_error") from exc
    return Download(text, "text/x-c; charset=utf-8", f"{file_stem(unit.serial)}.h")


def report_context(unit: Unit, session_id: int) -> dict[str, Any]:
    """What reports/page.html shows for one session: the stored record read back (points,
    fit, decision, budget at mid-range), the sensor type and a static curve figure."""
    record = calibrations.get_session_of(unit, session_id)
    calibration = calibrations.calibration_read(record)
    fit, _ = calibrations.fit_of(record)
    sensor_type = unit.sensor_type
    axes = charts.Axes(sensor_type.quantity, sensor_type.value_unit, sensor_type.reading_unit)
    figure = charts.curve_figure(fit, axes)
    suspects = {s.index: s.reason for s in calibration.suspects}
    residuals = charts.residual_figure(
        fit,
        axes,
        tolerance_abs=sensor_type.tolerance_abs,
        tolerance_rel=sensor_type.tolerance_rel,
        suspects=suspects,
    )
    for fig, height in ((figure, REPORT_PLOT_HEIGHT), (residuals, REPORT_RESIDUAL_HEIGHT)):
        fig.update_layout(width=REPORT_PLOT_WIDTH, height=height, autosize=False, hovermode=False)
    current = latest_session(unit.sessions)
    return {
        "unit": unit,
        "sensor_type": sensor_type,
        "record": record,
        "calibration": calibration,
        "is_current": current is not None and current.id == record.id,
        "value_range": tuple(float(v) for v in fit.to_value(list(fit.valid_range))),
        "curve_json": figure.to_json(),
        "residual_json": residuals.to_json(),
        "residual_format": f"%.{residual_decimals(fit.rse)}f",
    }
