"""Uncertainty budget of a converted value (GUM): type A from the fit, type B from the session.

Rows, each with its standard uncertainty in its own unit, the sensitivity coefficient that turns
it into value units, and its contribution (GUM 5.1.3, c_i u(x_i)):

* calibration curve (type A): the fitted constants, GUM law of propagation through the covariance;
* repeatability of a new reading (type A): one observation's noise as the fit estimated it
  (in reading units times d value / d reading, or directly in value units);
* reference standard (type B): its expanded uncertainty U divided by its coverage factor k;
* reading resolution (type B): one reading step as a rectangular distribution, step / sqrt(12)
  (GUM 4.3.7), times d value / d reading;
* any stated extra term (type B), given as a standard uncertainty in value units.

The combined standard uncertainty is the root sum of squares (inputs taken as uncorrelated); the
coverage factor is Student's t at the Welch–Satterthwaite effective degrees of freedom
(GUM G.4.1), type B terms counting as infinitely many and the type A rows (which share the fit's
one estimate of the noise) as a single term with the fit's degrees of freedom.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from shared.errors import BadInput
from shared.fitting import Fit
from shared.uncertainty import coverage_factor


@dataclass(frozen=True, slots=True)
class TypeB:
    """Type B inputs recorded with a session (value units unless stated)."""

    reference_expanded: float | None = None  # U of the reference standard
    reference_k: float = 2.0
    resolution: float | None = None  # one reading step, reading units
    extra_u: float | None = None  # a stated standard uncertainty
    extra_label: str = "stated extra term"


@dataclass(frozen=True, slots=True)
class BudgetRow:
    source: str
    kind: str  # "A" or "B"
    distribution: str
    u: float  # standard uncertainty in ``unit``
    unit: str
    sensitivity: float  # value units per ``unit``
    contribution: float  # |sensitivity| * u, value units
    dof: float  # degrees of freedom (inf for type B)


@dataclass(frozen=True, slots=True)
class Budget:
    reading: float
    value: float
    rows: tuple[BudgetRow, ...]
    u: float  # combined standard uncertainty, value units
    dof_eff: float
    k: float
    expanded: float  # U = k u
    level: float

    def to_dict(self) -> dict[str, object]:
        return {
            "reading": self.reading,
            "value": self.value,
            "rows": [
                {
                    "source": r.source,
                    "kind": r.kind,
                    "distribution": r.distribution,
                    "u": r.u,
                    "unit": r.unit,
                    "sensitivity": r.sensitivity,
                    "contribution": r.contribution,
                    "dof": r.dof if np.isfinite(r.dof) else None,
                }
                for r in self.rows
            ],
            "u": self.u,
            "dof_eff": self.dof_eff if np.isfinite(self.dof_eff) else None,
            "k": self.k,
            "expanded": self.expanded,
            "level": self.level,
        }


def welch_satterthwaite(contributions: Sequence[float], dofs: Sequence[float]) -> float:
    """nu_eff = u_c^4 / sum(c_i^4 u_i^4 / nu_i) (GUM G.4.1); inf when every nu_i is inf."""
    c = np.asarray(contributions, dtype=float)
    nu = np.asarray(dofs, dtype=float)
    u4 = float(np.sum(c**2)) ** 2
    denominator = float(np.sum(np.where(np.isfinite(nu), c**4 / nu, 0.0)))
    return np.inf if denominator == 0 else u4 / denominator


def budget(
    result: Fit,
    reading: float,
    inputs: TypeB | None = None,
    *,
    level: float = 0.95,
    value_unit: str = "",
    reading_unit: str = "",
) -> Budget:
    """The budget of the value converted from one new ``reading`` (see the module docstring)."""
    inputs = inputs or TypeB()
    if not result.in_range(reading):
        raise BadInput(
            f"reading {reading:g} is outside the valid range {result.valid_range}; "
            "an uncertainty budget is only stated inside it"
        )
    fit_dof = np.inf if result.sigma_source == "given" else float(result.dof)
    slope = float(result.slope(reading)[0])
    rows = [
        _row(
            "calibration curve (fitted constants)",
            "A",
            "normal",
            float(result.curve_band(reading, level=None).u[0]),
            value_unit,
            1.0,
            fit_dof,
        )
    ]
    if result.noise_reading_sd:
        rows.append(
            _row(
                "repeatability of a new reading",
                "A",
                "normal",
                result.noise_reading_sd,
                reading_unit,
                slope,
                fit_dof,
            )
        )
    if result.noise_value_sd:
        rows.append(
            _row(
                "repeatability of a new reading",
                "A",
                "normal",
                result.noise_value_sd,
                value_unit,
                1.0,
                fit_dof,
            )
        )
    if inputs.reference_expanded:
        if inputs.reference_k <= 0:
            raise BadInput("the reference standard's coverage factor k must be positive")
        rows.append(
            _row(
                f"reference standard (U = {_with_unit(inputs.reference_expanded, value_unit)}, "
                f"k = {inputs.reference_k:g})",
                "B",
                "normal",
                inputs.reference_expanded / inputs.reference_k,
                value_unit,
                1.0,
                np.inf,
            )
        )
    if inputs.resolution:
        rows.append(
            _row(
                f"reading resolution (step {_with_unit(inputs.resolution, reading_unit)})",
                "B",
                "rectangular",
                inputs.resolution / np.sqrt(12.0),
                reading_unit,
                slope,
                np.inf,
            )
        )
    if inputs.extra_u:
        rows.append(
            _row(inputs.extra_label, "B", "normal", inputs.extra_u, value_unit, 1.0, np.inf)
        )
    contributions = [r.contribution for r in rows]
    u = float(np.sqrt(np.sum(np.square(contributions))))
    # the type A rows all scale with the one residual variance of the fit, so they enter the
    # Welch-Satterthwaite formula as one term with the fit's degrees of freedom
    type_a = float(np.sqrt(sum(r.contribution**2 for r in rows if r.kind == "A")))
    type_b = [r.contribution for r in rows if r.kind == "B"]
    dof_eff = welch_satterthwaite([type_a, *type_b], [fit_dof] + [np.inf] * len(type_b))
    k = coverage_factor(level, dof_eff)
    return Budget(
        reading=float(reading),
        value=float(result.to_value(reading)),
        rows=tuple(rows),
        u=u,
        dof_eff=dof_eff,
        k=k,
        expanded=k * u,
        level=level,
    )


def _row(
    source: str, kind: str, distribution: str, u: float, unit: str, sensitivity: float, dof: float
) -> BudgetRow:
    return BudgetRow(
        source,
        kind,
        distribution,
        float(u),
        unit,
        float(sensitivity),
        float(abs(sensitivity) * u),
        float(dof),
    )


def _with_unit(x: float, unit: str) -> str:
    return f"{x:g} {unit}" if unit else f"{x:g}"
