"""The conversion table of a fit: reading -> value with its expanded uncertainty, as CSV or
JSON (see the package docstring)."""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shared.errors import BadInput
from shared.exports._common import MAX_TABLE_ROWS, Array
from shared.fitting import Fit


@dataclass(frozen=True, slots=True, eq=False)
class Table:
    """Rows reading -> value, expanded uncertainty ``expanded = k u`` (value units).

    ``value``, ``u`` and ``expanded`` are NaN where ``in_range`` is False (outside the fit's valid
    range); ``level`` is None for the k = 2 convention, else the Student-t coverage level.
    """

    family: str
    reading: Array
    value: Array
    u: Array
    expanded: Array
    k: float
    level: float | None
    in_range: NDArray[np.bool_]
    valid_range: tuple[float, float]
    engine_version: str


def _frozen(arr: NDArray[Any]) -> NDArray[Any]:
    arr.setflags(write=False)
    return arr


def conversion_table(
    fit: Fit,
    reading_min: float,
    reading_max: float,
    step: float = 1,
    *,
    level: float | None = None,
) -> Table:
    """Readings ``reading_min, reading_min + step, ... <= reading_max`` converted by ``fit``.

    Parameters
    ----------
    fit : the calibration curve.
    reading_min, reading_max, step : the rows, in reading units (every code: step 1).
    level : coverage level of the expanded uncertainty (Student t at the fit's dof, normal for
        given uncertainties); None (default) for the k = 2 convention.
    """
    lo, hi, st = float(reading_min), float(reading_max), float(step)
    if not (math.isfinite(lo) and math.isfinite(hi) and math.isfinite(st)):
        raise BadInput("reading_min, reading_max and step must be finite numbers")
    if st <= 0:
        raise BadInput(f"step must be > 0, not {step}")
    if hi < lo:
        raise BadInput(f"reading_max {reading_max} is below reading_min {reading_min}")
    if level is not None and not 0.0 < level < 1.0:
        raise BadInput(f"level must lie between 0 and 1 (e.g. 0.95), not {level}")
    rows = math.floor((hi - lo) / st + 1e-9) + 1
    if rows > MAX_TABLE_ROWS:
        raise BadInput(f"{rows} rows exceed the limit of {MAX_TABLE_ROWS}; use a larger step")
    reading = np.minimum(lo + np.arange(rows) * st, hi)
    with np.errstate(all="ignore"):  # the formula outside the valid range is masked anyway
        value = fit.to_value(reading)
    inside = fit.in_range(reading)
    u = np.full(rows, np.nan)
    probe = reading[inside] if inside.any() else np.array([fit.valid_range[0]])
    interval = fit.value_interval(probe, level)
    if inside.any():
        u[inside] = interval.u
    return Table(
        family=fit.family,
        reading=_frozen(reading),
        value=_frozen(np.asarray(value, dtype=float)),
        u=_frozen(u),
        expanded=_frozen(interval.k * u),
        k=float(interval.k),
        level=level,
        in_range=_frozen(np.asarray(inside, dtype=bool)),
        valid_range=fit.valid_range,
        engine_version=fit.engine_version,
    )


def _number(x: float) -> str:
    """Shortest text that reads back as exactly ``x``; whole numbers without a decimal point."""
    if x.is_integer() and abs(x) < 2**53:
        return str(int(x))
    return repr(float(x))


def _coverage_label(table: Table) -> str:
    if table.level is None:
        return f"k = {table.k:g}"
    return f"k = {table.k:.4g}, level {table.level:g}"


def table_to_csv(table: Table, value_unit: str, reading_unit: str) -> str:
    """CSV text: ``reading [unit], value [unit], expanded uncertainty [unit] (k = ..), status``.

    Values print with the shortest digits that read back exactly; out-of-range rows have empty
    value and uncertainty and the status ``out of range``.
    """
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(
        [
            f"reading [{reading_unit}]",
            f"value [{value_unit}]",
            f"expanded uncertainty [{value_unit}] ({_coverage_label(table)})",
            "status",
        ]
    )
    for r, v, big_u, ok in zip(
        table.reading.tolist(),
        table.value.tolist(),
        table.expanded.tolist(),
        table.in_range.tolist(),
        strict=True,
    ):
        if ok:
            writer.writerow([_number(r), _number(v), _number(big_u), "in range"])
        else:
            writer.writerow([_number(r), "", "", "out of range"])
    return out.getvalue()


def table_to_json(table: Table, value_unit: str, reading_unit: str) -> str:
    """Plain JSON (no NaN): units, coverage, valid range and rows; ``null`` out of range."""
    rows = [
        {
            "reading": r,
            "value": v if ok else None,
            "expanded_uncertainty": big_u if ok else None,
            "in_range": ok,
        }
        for r, v, big_u, ok in zip(
            table.reading.tolist(),
            table.value.tolist(),
            table.expanded.tolist(),
            table.in_range.tolist(),
            strict=True,
        )
    ]
    doc = {
        "family": table.family,
        "engine_version": table.engine_version,
        "reading_unit": reading_unit,
        "value_unit": value_unit,
        "valid_range": list(table.valid_range),
        "coverage": {"k": table.k, "level": table.level},
        "rows": rows,
    }
    return json.dumps(doc, allow_nan=False)
