"""Acceptance of a calibration against a sensor type's tolerance.

Decision rule (common practice, no single source; stated in every decision):
the allowed error at a point is ``tolerance_abs + tolerance_rel/100 * |value|`` (either part may be
absent). The unit passes when

1. every used point's residual is within the allowed error;
2. the expanded uncertainty U (k = 2) at every used point is at most the allowed error divided by
   the test-uncertainty ratio (TUR, 4:1 by default). U = 2 sqrt(u_curve^2 + u_ref^2 + u_res^2):
   the fitted curve's standard uncertainty (law of propagation through the covariance), and, when
   the session states them (``type_b``), the reference standard's U/k (value units) and one
   reading step as a rectangular distribution, step/sqrt(12), times |d value / d reading| at the
   point (GUM 4.3.7). Without type B inputs U is the fitted curve's alone. A stated extra term
   (``TypeB.extra_u``) belongs to the uncertainty budget of a converted value
   (``shared.budget``), not to this check;
3. the fitted curve is monotone over its valid range (``Fit.monotone``): where it is not, one
   reading stands for two values and the curve cannot go into an instrument.

Decision rules (ILAC-G8:2019), chosen per sensor type:

* ``simple`` acceptance (ILAC-G8 "simple acceptance", shared risk): the acceptance limit is the
  tolerance itself, with the TUR requirement of point 2 above;
* ``guarded`` acceptance: the acceptance limit at each point is the allowed error minus a guard
  band w = r U (r = ``guard_multiple``, 1 by default: w = U, k = 2), and point 2 is not applied
  (the guard band takes the uncertainty into account instead). Where w reaches the allowed error
  no value can be accepted there.

In both cases the specific risk of a false accept is given for a passing unit: at each used point,
the probability, from a normal distribution centred on the measured error with the standard
uncertainty U / k, that the true error lies outside the allowed error (JCGM 106:2012, 7.3, the
"specific conformance probability"'s complement); the largest over the points, and where.

"Closest to its limit" (``worst_error`` and its point) is the used point with the largest
|error| / allowed, the share of its tolerance it uses (``tolerance_used_pct``, in %): with a
tolerance that grows with the value, a small error at a small value can use more of its
tolerance than a larger error at a large value, and the other way round.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy.stats import norm

from shared.budget import TypeB
from shared.errors import BadInput
from shared.fitting import Fit
from shared.uncertainty import K_CONVENTION

DEFAULT_TUR = 4.0
DecisionRule = Literal["simple", "guarded"]
DEFAULT_GUARD_MULTIPLE = 1.0  # w = 1 x U: ILAC-G8:2019's usual guard band


@dataclass(frozen=True, slots=True)
class Decision:
    """Pass or fail, the rule in words, and the numbers that decided it (value units)."""

    passed: bool
    rule: str
    reasons: tuple[str, ...]
    worst_error: float  # |residual| of the used point closest to its limit (largest |e| / allowed)
    worst_error_at: float  # its reference value
    allowed_at_worst: float  # the error allowed there
    max_expanded_uncertainty: float  # largest U (k = 2) judged for the TUR among used points
    tur_required: float
    tur_achieved: float  # smallest allowed / U over used points
    tolerance_used_pct: float = 0.0  # 100 worst_error / allowed_at_worst: share of tolerance used
    decision_rule: str = "simple"  # "simple" or "guarded" (ILAC-G8:2019)
    guard_multiple: float | None = None  # r of w = r U (guarded only)
    guard_band_at_worst: float | None = None  # w at the worst point (guarded only)
    acceptance_limit_at_worst: float | None = None  # allowed - w there (guarded; else allowed)
    false_accept_risk: float | None = None  # largest specific risk of a false accept (passed)
    false_accept_at: float | None = None  # the reference value where it is largest

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
            "tolerance_used_pct": self.tolerance_used_pct,
            "decision_rule": self.decision_rule,
            "guard_multiple": self.guard_multiple,
            "guard_band_at_worst": self.guard_band_at_worst,
            "acceptance_limit_at_worst": self.acceptance_limit_at_worst,
            "false_accept_risk": self.false_accept_risk,
            "false_accept_at": self.false_accept_at,
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
    type_b: TypeB | None = None,
    reading_unit: str = "",
    rule_kind: DecisionRule = "simple",
    guard_multiple: float = DEFAULT_GUARD_MULTIPLE,
) -> Decision:
    """Judge ``result`` against the tolerance; see the module docstring for the rule.

    ``type_b``: the session's reference standard (``reference_expanded``, ``reference_k``, value
    units) and the reading resolution (``resolution``, reading units) enter the U judged for the
    TUR. ``unit`` and ``reading_unit`` only word the rule and the reasons.
    """
    if not (tolerance_abs or tolerance_rel):
        raise BadInput("a tolerance is needed: give tolerance_abs and/or tolerance_rel")
    if (tolerance_abs or 0) < 0 or (tolerance_rel or 0) < 0 or tur <= 0:
        raise BadInput("tolerances and the TUR must be positive")
    if rule_kind not in ("simple", "guarded"):
        raise BadInput(f"the decision rule must be 'simple' or 'guarded', not {rule_kind!r}")
    if not (np.isfinite(guard_multiple) and guard_multiple >= 0):
        raise BadInput("the guard band multiple must be a finite number, 0 or more")
    guarded = rule_kind == "guarded"
    inputs = type_b or TypeB()
    if inputs.reference_expanded is not None and inputs.reference_expanded < 0:
        raise BadInput("the reference standard's expanded uncertainty must not be negative")
    if inputs.reference_expanded and inputs.reference_k <= 0:
        raise BadInput("the reference standard's coverage factor k must be positive")
    if inputs.resolution is not None and inputs.resolution < 0:
        raise BadInput("the reading resolution must not be negative")
    sp = " " if unit else ""
    u_ref = inputs.reference_expanded / inputs.reference_k if inputs.reference_expanded else 0.0
    terms = ["the fitted curve"]
    if u_ref:
        terms.append(
            f"the reference standard (U = {inputs.reference_expanded:g}{sp}{unit}, "
            f"k = {inputs.reference_k:g})"
        )
    if inputs.resolution:
        step = f"{inputs.resolution:g} {reading_unit}".rstrip()
        terms.append(f"the reading resolution (one step = {step}, rectangular)")
    tol_text = describe_tolerance(tolerance_abs, tolerance_rel, unit)
    if len(terms) == 1:
        of_what = f"the expanded uncertainty of the fitted curve (k = {K_CONVENTION:g})"
    else:
        of_what = (
            f"the expanded uncertainty (k = {K_CONVENTION:g}) of {', '.join(terms[:-1])} and "
            f"{terms[-1]} combined"
        )
    if guarded:
        rule = (
            f"Guarded acceptance (ILAC-G8:2019): pass when every residual is within the "
            f"acceptance limit, the tolerance {tol_text} less a guard band w = "
            f"{guard_multiple:g} U at each point, U being {of_what}, and the fitted curve is "
            f"monotone over its valid range."
        )
    else:
        rule = (
            f"Simple acceptance (ILAC-G8:2019): pass when every residual is within {tol_text}, "
            f"{of_what} is at most 1/{tur:g} of that tolerance at every point "
            f"(test-uncertainty ratio {tur:g}:1, common practice), and the fitted curve is "
            f"monotone over its valid range."
        )
    used = result.used
    value = result.value[used]
    reading = result.reading[used]
    error = np.abs(result.residuals[used])
    allowed = (tolerance_abs or 0.0) + (tolerance_rel or 0.0) / 100.0 * np.abs(value)
    u_curve = result.curve_band(reading, level=None).u
    u_res = (
        inputs.resolution / np.sqrt(12.0) * np.abs(result.slope(reading))
        if inputs.resolution
        else np.zeros_like(u_curve)
    )
    big_u = K_CONVENTION * np.sqrt(u_curve**2 + u_ref**2 + u_res**2)
    guard = guard_multiple * big_u if guarded else np.zeros_like(big_u)
    limit = allowed - guard
    used_share = tolerance_share(error, allowed)
    worst = int(np.argmax(used_share))
    ratio = np.divide(allowed, big_u, out=np.full_like(allowed, np.inf), where=big_u > 0)
    reasons = []
    outside = error > limit if guarded else error > allowed
    n_out = int(np.sum(outside))
    if n_out and guarded:
        bad = int(np.argmax(np.where(outside, error - limit, -np.inf)))
        reasons.append(
            f"{n_out} point(s) outside the acceptance limit (tolerance less the guard band "
            f"w = {guard_multiple:g} U); e.g. error {error[bad]:.4g}{sp}{unit} at "
            f"{value[bad]:.6g}{sp}{unit}, where {max(limit[bad], 0.0):.4g}{sp}{unit} is "
            f"accepted ({allowed[bad]:.4g}{sp}{unit} allowed, w = {guard[bad]:.4g}{sp}{unit})"
        )
    elif n_out:
        reasons.append(
            f"{n_out} point(s) outside tolerance; worst error {error[worst]:.4g}{sp}{unit} "
            f"at {value[worst]:.6g}{sp}{unit}, where {allowed[worst]:.4g}{sp}{unit} is allowed"
        )
    if not guarded and ratio.min() < tur:
        reasons.append(f"test-uncertainty ratio {ratio.min():.3g}:1 is below {tur:g}:1")
    if not result.monotone:
        lo, hi = result.valid_range
        reasons.append(
            f"the fitted curve is not monotone over its valid range (readings {lo:.6g} to "
            f"{hi:.6g}): one reading there stands for two values"
        )
    risk = specific_false_accept(result.residuals[used], allowed, big_u / K_CONVENTION)
    at = int(np.argmax(risk))
    passed = not reasons
    return Decision(
        passed=passed,
        rule=rule,
        reasons=tuple(reasons),
        worst_error=float(error[worst]),
        worst_error_at=float(value[worst]),
        allowed_at_worst=float(allowed[worst]),
        max_expanded_uncertainty=float(big_u.max()),
        tur_required=tur,
        tur_achieved=float(ratio.min()),
        tolerance_used_pct=float(100.0 * used_share[worst]),
        decision_rule=rule_kind,
        guard_multiple=guard_multiple if guarded else None,
        guard_band_at_worst=float(guard[worst]) if guarded else None,
        acceptance_limit_at_worst=float(limit[worst]),
        false_accept_risk=float(risk[at]) if passed else None,
        false_accept_at=float(value[at]) if passed else None,
    )


def specific_false_accept(error: np.ndarray, allowed: np.ndarray, u: np.ndarray) -> np.ndarray:
    """P(|true error| > allowed) for a measured error with standard uncertainty u, from a normal
    distribution centred on the measured error (JCGM 106:2012, 7.3 and 9.5): for an accepted
    point, the specific risk that it is in fact out of tolerance. u = 0: 0 or 1."""
    error = np.asarray(error, dtype=float)
    allowed = np.asarray(allowed, dtype=float)
    u = np.asarray(u, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        above = norm.sf((allowed - error) / u)
        below = norm.cdf((-allowed - error) / u)
    exact = (np.abs(error) > allowed).astype(float)
    return np.asarray(np.where(u > 0, above + below, exact))


def tolerance_share(error: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """|error| / allowed at each point: the share of its tolerance a point uses (1 = at the
    limit). Where nothing is allowed (a relative tolerance at value 0) any error uses an
    infinite share, none uses none."""
    error = np.abs(error)
    share = np.divide(error, allowed, out=np.zeros_like(error), where=allowed > 0)
    return np.where((allowed <= 0) & (error > 0), np.inf, share)
