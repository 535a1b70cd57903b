"""Acceptance of a calibration against a sensor type's tolerance.

Decision rule (common practice, no single source; stated in every decision):
the allowed error at a point is ``tolerance_abs + tolerance_rel/100 * |value|`` (either part may be
absent). The unit passes when (1) every used point's residual is within the allowed error, and
(2) the expanded uncertainty (k = 2) of the fitted curve at every used point is at most the allowed
error divided by the test-uncertainty ratio (TUR, 4:1 by default).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from shared.errors import BadInput
from shared.fitting import Fit
from shared.uncertainty import K_CONVENTION

DEFAULT_TUR = 4.0


@dataclass(frozen=True, slots=True)
class Decision:
    """Pass or fail, the rule in words, and the numbers that decided it (value units)."""

    passed: bool
    rule: str
    reasons: tuple[str, ...]
    worst_error: float  # largest |residual| among used points
    worst_error_at: float  # reference value where it occurs
    allowed_at_worst: float  # allowed error at that point
    max_expanded_uncertainty: float  # largest k = 2 curve uncertainty among used points
    tur_required: float
    tur_achieved: float  # smallest allowed / U over used points

    def to_dict(self) -> dict[str, object]:
        return {
            "passed": self.passed,
            "rule": self.rule,
            "reasons": list(self.reasons),
            "worst_error": self.worst_error,
            "worst_error_at": self.worst_error_at,
            "allowed_at_worst": self.allowed_at_worst,
            "max_expanded_uncertainty": self.max_expanded_uncertainty,
            "tur_required": self.tur_required,
            "tur_achieved": self.tur_achieved,
        }


def describe_tolerance(
    tolerance_abs: float | None, tolerance_rel: float | None, unit: str = ""
) -> str:
    """'±1 deg', '±0.5 % of value', '±(3 mm + 2 % of value)'."""
    parts = []
    if tolerance_abs:
        parts.append(f"{tolerance_abs:g} {unit}".rstrip())
    if tolerance_rel:
        parts.append(f"{tolerance_rel:g} % of value")
    return f"±{parts[0]}" if len(parts) == 1 else "±(" + " + ".join(parts) + ")"


def decide(
    result: Fit,
    tolerance_abs: float | None,
    tolerance_rel: float | None,
    *,
    tur: float = DEFAULT_TUR,
    unit: str = "",
) -> Decision:
    """Judge ``result`` against the tolerance; see the module docstring for the rule."""
    if not (tolerance_abs or tolerance_rel):
        raise BadInput("a tolerance is needed: give tolerance_abs and/or tolerance_rel")
    if (tolerance_abs or 0) < 0 or (tolerance_rel or 0) < 0 or tur <= 0:
        raise BadInput("tolerances and the TUR must be positive")
    tol_text = describe_tolerance(tolerance_abs, tolerance_rel, unit)
    rule = (
        f"Pass when every residual is within {tol_text} and the expanded uncertainty of the "
        f"fitted curve (k = {K_CONVENTION:g}) is at most 1/{tur:g} of that tolerance at every "
        f"point (test-uncertainty ratio {tur:g}:1, common practice)."
    )
    used = result.used
    value = result.value[used]
    error = np.abs(result.residuals[used])
    allowed = (tolerance_abs or 0.0) + (tolerance_rel or 0.0) / 100.0 * np.abs(value)
    big_u = K_CONVENTION * result.curve_band(result.reading[used], level=None).u
    worst = int(np.argmax(error - allowed))
    ratio = np.divide(allowed, big_u, out=np.full_like(allowed, np.inf), where=big_u > 0)
    reasons = []
    sp = " " if unit else ""
    n_out = int(np.sum(error > allowed))
    if n_out:
        reasons.append(
            f"{n_out} point(s) outside tolerance; worst error {error[worst]:.4g}{sp}{unit} "
            f"at {value[worst]:.6g}{sp}{unit}, where {allowed[worst]:.4g}{sp}{unit} is allowed"
        )
    if ratio.min() < tur:
        reasons.append(f"test-uncertainty ratio {ratio.min():.3g}:1 is below {tur:g}:1")
    return Decision(
        passed=not reasons,
        rule=rule,
        reasons=tuple(reasons),
        worst_error=float(error[worst]),
        worst_error_at=float(value[worst]),
        allowed_at_worst=float(allowed[worst]),
        max_expanded_uncertainty=float(big_u.max()),
        tur_required=tur,
        tur_achieved=float(ratio.min()),
    )
