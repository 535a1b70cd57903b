"""Drift of one unit between two calibrations, En numbers, and the as-found check.

compare(previous, current)
    The two calibration curves over their common valid range: the deviation
    d(r) = current(r) - previous(r) (value units) on a grid of readings, its largest magnitude,
    the En number there, and a *simultaneous* significance test for the whole curve.

    Why simultaneous. En = d / sqrt(U_prev^2 + U_cur^2) with expanded (k = 2) uncertainties is a
    test at one point (ISO/IEC 17043: |En| <= 1 satisfactory). Taking the largest deviation over
    a curve and then judging it as if it were the only point inflates false alarms: one looks at
    many correlated points and reports the worst. The significance here is therefore decided on
    max_r |d(r)| / sd(r) against the 95 % quantile of that maximum under "no drift".

    The critical value is found by simulation (not a Scheffé / Working–Hotelling bound): the two
    fits are independent, so to first order d(r) - E d(r) = g_p(r) e_p + g_c(r) e_c with
    e ~ N(0, V) for each fit's parameter covariance V and g = d value / d params. Each draw also
    rescales each fit's variance by chi^2_nu / nu (nu = the fit's dof) when that fit's
    covariance was estimated from its residuals, so the statistic is studentised as the observed
    one is (a given, absolute covariance is not rescaled). The statistic max_r |d*(r)| / sd*(r) is
    taken over the same grid as the observed one, and its 95 % quantile is the critical value.
    This is exact for the linearised model on the grid, whatever the correlation between grid
    points and however many parameters the two families have; Scheffé's sqrt(p F_{p, nu}) with
    p = p_prev + p_cur is valid but conservative, since a curve is not free in all p directions
    at once, and it has no single nu when the two fits have different dof. The draws use a fixed
    seed inside the function, so a comparison is reproducible.

    The simulated quantile is floored at z_{(1 + level) / 2} (``pointwise_floor``), a proven lower
    bound of the true one, so simulation error never puts it below.

    A drift flag needs both: the deviation beyond the drift limit somewhere on the common range,
    and the difference significant by the simultaneous test. Without a drift limit, ``drifted``
    is the significance alone (said so in ``rule``).

could_drift(previous, current, ...)
    The same grid without the simulation: False when the deviation stays within the drift limit
    or max |d| / sd is at most that floor, i.e. when ``compare`` is certain to say "not drifted".
    Flag recomputation asks it first; most units of a fleet never reach the simulation.

en_number, satisfactory
    ISO/IEC 17043 normalised error with expanded uncertainties, and |En| <= 1 judged with a tiny
    relative tolerance for floating point at the boundary.

as_found(previous, reading, value, ...)
    The previous calibration applied to a new session's points: was the unit out of tolerance while
    in service? Points outside the previous valid range are reported, not judged.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import overload

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from shared.acceptance import describe_tolerance, tolerance_share
from shared.errors import BadInput, OutOfRange
from shared.families.base import Array
from shared.fitting import Fit, Interval
from shared.uncertainty import K_CONVENTION

DEFAULT_POINTS = 201  # grid of readings over the common valid range
DEFAULT_DRAWS = 4000  # simulation draws for the simultaneous critical value
DEFAULT_LEVEL = 0.95
SEED = 17043  # fixed: the same two fits always give the same critical value
CHUNK = 1_000_000  # grid points x draws handled at once in the simulation
EN_REL_EPS = 1e-9  # |En| within 1e-9 (relative) of 1 counts as 1; see ``satisfactory``

Index = NDArray[np.intp]
Mask = NDArray[np.bool_]


# -- En (ISO/IEC 17043) -------------------------------------------------------------------------
@overload
def en_number(x: float, U_x: float, X: float, U_X: float) -> float: ...
@overload
def en_number(x: ArrayLike, U_x: ArrayLike, X: ArrayLike, U_X: ArrayLike) -> Array: ...
def en_number(x: ArrayLike, U_x: ArrayLike, X: ArrayLike, U_X: ArrayLike) -> float | Array:
    """Normalised error En = (x - X) / sqrt(U_x^2 + U_X^2) (ISO/IEC 17043, ISO 13528).

    Parameters
    ----------
    x, U_x : a result and its EXPANDED uncertainty (normally k = 2), same units.
    X, U_X : the reference (assigned, or previous) value and its expanded uncertainty.

    Scalars give a float; arrays broadcast and give an array. Raises ``BadInput`` for a negative
    uncertainty or where both uncertainties are 0 (En undefined).
    """
    xs, ux, ref, uref = (np.asarray(a, dtype=float) for a in (x, U_x, X, U_X))
    if np.any(ux < 0) or np.any(uref < 0):
        raise BadInput("expanded uncertainties must not be negative")
    denom = np.sqrt(ux**2 + uref**2)
    if np.any(denom == 0):
        raise BadInput("En is undefined when both expanded uncertainties are 0")
    en = (xs - ref) / denom
    if en.ndim == 0:
        return float(en)
    return np.asarray(en, dtype=float)


def satisfactory(en: float, *, rel_eps: float = EN_REL_EPS) -> bool:
    """|En| <= 1 (ISO/IEC 17043), with |En| <= 1 + ``rel_eps`` accepted as the boundary.

    In exact arithmetic En = 1 is satisfactory, but e.g. (10.05 - 10.00) / sqrt(0.04^2 + 0.03^2)
    evaluates to 1.0000000000000142 in IEEE double (the subtraction 10.05 - 10.00 is inexact).
    The default 1e-9 absorbs the cancellation error of x - X when x is up to ~10^6 times the
    difference, and is far below any precision an En is reported to, so no real decision moves.
    """
    return bool(abs(en) <= 1.0 + rel_eps)


# -- compare two calibrations -------------------------------------------------------------------
def _frozen(arr: Array) -> Array:
    out = np.array(arr, dtype=float)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, slots=True, eq=False)
class DriftResult:
    """The new curve against the previous one over their common valid range (value units).

    ``max_deviation`` is the signed current - previous value where |deviation| is largest on the
    grid, at reading ``at_reading``; ``at_value`` is the current curve's value there.
    ``en_at_max`` is En at that point with each curve's expanded (k = 2) uncertainty of the
    constants (``Fit.curve_band(level=None)``). ``z_simultaneous`` = max over the grid of
    |deviation| / sd (sd = standard uncertainty of the difference), judged against ``critical``
    (see the module docstring); ``significant`` = z_simultaneous > critical. ``exceeds_limit`` is
    None when no drift limit was given. ``drifted`` = exceeds_limit and significant (significant
    alone without a limit). Grid arrays for plotting: ``reading``, ``deviation``, ``sd`` and
    ``band`` = critical * sd, the simultaneous band of the difference around 0.
    """

    common_range: tuple[float, float]
    max_deviation: float
    at_reading: float
    at_value: float
    en_at_max: float
    z_simultaneous: float
    z_at_reading: float  # the reading where |deviation| / sd is largest
    critical: float
    level: float
    significant: bool
    drift_limit: float | None
    exceeds_limit: bool | None
    drifted: bool
    rule: str
    reading: Array
    deviation: Array
    sd: Array
    band: Array

    def to_dict(self) -> dict[str, object]:
        return {
            "common_range": list(self.common_range),
            "max_deviation": self.max_deviation,
            "at_reading": self.at_reading,
            "at_value": self.at_value,
            "en_at_max": self.en_at_max,
            "z_simultaneous": self.z_simultaneous,
            "z_at_reading": self.z_at_reading,
            "critical": self.critical,
            "level": self.level,
            "significant": self.significant,
            "drift_limit": self.drift_limit,
            "exceeds_limit": self.exceeds_limit,
            "drifted": self.drifted,
            "rule": self.rule,
            "reading": self.reading.tolist(),
            "deviation": self.deviation.tolist(),
            "sd": self.sd.tolist(),
            "band": self.band.tolist(),
        }


def common_range(a: Fit, b: Fit) -> tuple[float, float]:
    """The readings both fits are valid for; ``OutOfRange`` when the ranges do not overlap."""
    lo = max(a.valid_range[0], b.valid_range[0])
    hi = min(a.valid_range[1], b.valid_range[1])
    if not lo < hi:
        raise OutOfRange(
            f"the valid ranges do not overlap (readings {a.valid_range[0]:.6g} to "
            f"{a.valid_range[1]:.6g} and {b.valid_range[0]:.6g} to {b.valid_range[1]:.6g}): "
            "the two calibrations cannot be compared"
        )
    return lo, hi


def _root(cov: Array) -> Array:
    """L with L L^T = cov (symmetric square root; tolerates a semi-definite covariance)."""
    sym = 0.5 * (cov + cov.T)
    eigval, eigvec = np.linalg.eigh(sym)
    return np.asarray(eigvec * np.sqrt(np.clip(eigval, 0.0, None)), dtype=float)


def _variance_scale(f: Fit, rng: np.random.Generator, draws: int) -> Array:
    """Per draw, s^2 / sigma^2 of a fit: chi^2_dof / dof when the covariance was estimated from
    the residuals; 1 when it is absolute (given uncertainties) or dof is 0."""
    if f.sigma_source == "residuals" and f.dof > 0:
        return np.asarray(rng.chisquare(f.dof, draws) / f.dof, dtype=float)
    return np.ones(draws)


def simultaneous_critical(
    previous: Fit,
    current: Fit,
    reading: Array,
    *,
    level: float = DEFAULT_LEVEL,
    draws: int = DEFAULT_DRAWS,
    seed: int = SEED,
) -> float:
    """The ``level`` quantile of max_r |d(r)| / sd(r) under no drift, by simulation.

    See the module docstring: the difference of two independent linearised fits, each fit's
    variance rescaled by chi^2_dof / dof per draw when estimated from residuals.
    """
    if not 0.0 < level < 1.0:
        raise BadInput(f"level must be in (0, 1), got {level}")
    if draws < 100:
        raise BadInput(f"at least 100 draws are needed for a critical value, got {draws}")
    rng = np.random.default_rng(seed)
    a_p = previous._gradient(reading) @ _root(np.asarray(previous.covariance, dtype=float))
    a_c = current._gradient(reading) @ _root(np.asarray(current.covariance, dtype=float))
    var_p = np.sum(a_p**2, axis=1)  # g V g^T at each grid point
    var_c = np.sum(a_c**2, axis=1)
    keep = (var_p + var_c) > 0
    if not keep.any():
        return 0.0
    a_p, a_c, var_p, var_c = a_p[keep], a_c[keep], var_p[keep], var_c[keep]
    z_p = rng.standard_normal((a_p.shape[1], draws))
    z_c = rng.standard_normal((a_c.shape[1], draws))
    w_p = _variance_scale(previous, rng, draws)
    w_c = _variance_scale(current, rng, draws)
    stat = np.empty(draws)
    block = max(1, CHUNK // a_p.shape[0])  # draws per block: bounded memory on long grids
    for start in range(0, draws, block):
        part = slice(start, start + block)
        # numerator: the estimation error of the difference (true variances, taken as
        # estimated); denominator: its standard uncertainty as each fit would estimate it,
        # s^2 = sigma^2 w
        diff = a_p @ z_p[:, part] + a_c @ z_c[:, part]  # (grid, block)
        sd = np.sqrt(np.outer(var_p, w_p[part]) + np.outer(var_c, w_c[part]))
        stat[part] = np.max(np.abs(diff) / sd, axis=0)
    return float(np.quantile(stat, level))


def pointwise_floor(level: float = DEFAULT_LEVEL) -> float:
    """A lower bound of the simultaneous critical value: the two-sided normal quantile
    z_{(1 + level) / 2} (1.96 at 95 %).

    Why. The maximum over the grid is at least |d(r)| / sd(r) at any one reading, and there that
    ratio is a standard normal divided by sqrt(s), s the per-draw variance scale with E[s] = 1
    (1 for absolute covariances). Its tail P(|ratio| > c) = E[2 (1 - Phi(c sqrt(s)))], and
    s -> 1 - Phi(c sqrt(s)) is convex for c > 0 (second derivative
    c phi(c sqrt s) (c^2 s + 1) / (4 s^(3/2)) > 0), so by Jensen's inequality the tail is at
    least 2 (1 - Phi(c)): the level quantile of the maximum is at least z_{(1 + level) / 2}.
    """
    return float(special.ndtri(0.5 + 0.5 * level))


def _difference(
    previous: Fit, current: Fit, points: int
) -> tuple[Array, Interval, Interval, Array, Array, Array]:
    """The grid over the common valid range, both curves' bands on it, the deviation
    current - previous, its standard uncertainty and |d| / sd (``compare``, ``could_drift``)."""
    lo, hi = common_range(previous, current)
    grid = np.linspace(lo, hi, points)
    band_p = previous.curve_band(grid, level=None)  # U = k u, k = 2 (uncertainty of constants)
    band_c = current.curve_band(grid, level=None)
    deviation = np.asarray(band_c.value - band_p.value, dtype=float)
    sd = np.sqrt(band_p.u**2 + band_c.u**2)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(sd > 0, np.abs(deviation) / sd, np.where(deviation == 0, 0.0, np.inf))
    return grid, band_p, band_c, deviation, sd, z


def could_drift(
    previous: Fit,
    current: Fit,
    *,
    drift_limit: float | None = None,
    points: int = DEFAULT_POINTS,
    level: float = DEFAULT_LEVEL,
) -> bool:
    """False only when ``compare(previous, current, ...)`` with the same arguments is certain
    to say "not drifted", found without its simulation (a few per cent of its cost): the
    deviation stays within the drift limit, or max |d| / sd is at most ``pointwise_floor``,
    below which no critical value lies. True means "compare to know". Raises as ``compare``."""
    if points < 2:
        raise BadInput(f"the grid needs at least 2 readings, got {points}")
    _, _, _, deviation, _, z = _difference(previous, current, points)
    if drift_limit is not None and not bool(np.max(np.abs(deviation)) > drift_limit):
        return False
    return bool(np.max(z) > pointwise_floor(level))


def compare(
    previous: Fit,
    current: Fit,
    *,
    drift_limit: float | None = None,
    points: int = DEFAULT_POINTS,
    level: float = DEFAULT_LEVEL,
    draws: int = DEFAULT_DRAWS,
    unit: str = "",
) -> DriftResult:
    """The current calibration against the previous one over their common valid range.

    Parameters
    ----------
    previous, current : the two fits of the same unit (any families; same value units).
    drift_limit : the sensor type's drift limit (value units); ``None`` if it has none.
    points : number of readings on the grid, evenly spaced over the common valid range.
    level : confidence level of the simultaneous test (0.95).
    draws : simulation draws for the critical value (fixed seed; see the module docstring).
    unit : value unit, used only in the words of ``rule``.

    Raises ``OutOfRange`` when the valid ranges do not overlap and ``BadInput`` for a negative
    drift limit or fewer than 2 grid points.
    """
    if drift_limit is not None and not (np.isfinite(drift_limit) and drift_limit >= 0):
        raise BadInput(f"the drift limit must be a finite number >= 0, got {drift_limit}")
    if points < 2:
        raise BadInput(f"the grid needs at least 2 readings, got {points}")
    grid, band_p, band_c, deviation, sd, z = _difference(previous, current, points)
    # floored at the one-point quantile, a proven lower bound (see ``pointwise_floor``): the
    # floor only removes simulation error, and ``could_drift`` relies on it
    critical = max(
        simultaneous_critical(previous, current, grid, level=level, draws=draws),
        pointwise_floor(level),
    )

    i = int(np.argmax(np.abs(deviation)))
    big_u = np.hypot(band_p.k * band_p.u[i], band_c.k * band_c.u[i])
    if big_u > 0:
        en = float(deviation[i] / big_u)
    else:
        en = 0.0 if deviation[i] == 0 else float(np.copysign(np.inf, deviation[i]))
    j = int(np.argmax(z))
    z_max = float(z[j])
    significant = bool(z_max > critical)
    exceeds = None if drift_limit is None else bool(np.max(np.abs(deviation)) > drift_limit)
    drifted = significant if exceeds is None else (exceeds and significant)

    sp = " " if unit else ""
    test = (
        f"significant when max |d| / u(d) over {points} readings of the common range exceeds "
        f"{critical:.3g}, the simultaneous {level:.0%} critical value of that maximum under no "
        f"drift (simulated from both fits' parameter covariances, {draws} draws, fixed seed), "
        f"not a per-point |En| > 1 rule; En at the largest deviation is reported with expanded "
        f"uncertainties of the constants (k = {K_CONVENTION:g})"
    )
    if drift_limit is None:
        rule = f"No drift limit given: drifted means the difference is significant; {test}."
    else:
        rule = (
            f"Drifted when the deviation current - previous exceeds the drift limit "
            f"{drift_limit:g}{sp}{unit} somewhere in the common valid range AND the difference is "
            f"{test}."
        )
    return DriftResult(
        common_range=(float(grid[0]), float(grid[-1])),
        max_deviation=float(deviation[i]),
        at_reading=float(grid[i]),
        at_value=float(band_c.value[i]),
        en_at_max=en,
        z_simultaneous=z_max,
        z_at_reading=float(grid[j]),
        critical=critical,
        level=level,
        significant=significant,
        drift_limit=drift_limit,
        exceeds_limit=exceeds,
        drifted=drifted,
        rule=rule,
        reading=_frozen(grid),
        deviation=_frozen(deviation),
        sd=_frozen(sd),
        band=_frozen(critical * sd),
    )


# -- as found -----------------------------------------------------------------------------------
@dataclass(frozen=True, slots=True, eq=False)
class AsFound:
    """The previous calibration applied to the new session's points (value units).

    Arrays are over the judged points (readings inside the previous valid range), in input order;
    ``index`` gives their positions in the input. ``error`` = previous.to_value(reading) - value
    (what the unit would have shown minus the reference); ``allowed`` = tolerance_abs +
    tolerance_rel/100 * |value|. The worst point is the one with the largest |error| - allowed
    (as in ``shared.acceptance.decide``). Points outside the previous valid range are listed in
    ``outside_index`` / ``outside_reading`` and are not judged.
    """

    index: Index
    reading: Array
    value: Array
    predicted: Array
    error: Array
    allowed: Array
    within: Mask  # per judged point
    in_tolerance: bool
    n_judged: int
    n_out: int
    worst_error: float  # signed error at the point closest to its limit (largest |e| / allowed)
    worst_at_reading: float
    worst_at_value: float
    allowed_at_worst: float
    outside_index: Index
    outside_reading: Array
    rule: str
    tolerance_used_pct: float = 0.0  # 100 |worst_error| / allowed_at_worst

    def to_dict(self) -> dict[str, object]:
        return {
            "index": self.index.tolist(),
            "reading": self.reading.tolist(),
            "value": self.value.tolist(),
            "predicted": self.predicted.tolist(),
            "error": self.error.tolist(),
            "allowed": self.allowed.tolist(),
            "within": self.within.tolist(),
            "in_tolerance": self.in_tolerance,
            "n_judged": self.n_judged,
            "n_out": self.n_out,
            "worst_error": self.worst_error,
            "worst_at_reading": self.worst_at_reading,
            "worst_at_value": self.worst_at_value,
            "allowed_at_worst": self.allowed_at_worst,
            "tolerance_used_pct": self.tolerance_used_pct,
            "outside_index": self.outside_index.tolist(),
            "outside_reading": self.outside_reading.tolist(),
            "rule": self.rule,
        }


def as_found(
    previous: Fit,
    reading: ArrayLike | Sequence[float],
    value: ArrayLike | Sequence[float],
    tolerance_abs: float | None,
    tolerance_rel: float | None,
    *,
    unit: str = "",
) -> AsFound:
    """Judge the new session's points (``reading``, reference ``value``) with ``previous``.

    Parameters
    ----------
    previous : the calibration that was in use while the unit was in service.
    reading : the new session's readings (reading units).
    value : their reference values (value units).
    tolerance_abs, tolerance_rel : the type's tolerance, value units and % of value.
    unit : value unit, used only in the words of ``rule``.

    Raises ``BadInput`` for mismatched or non-finite points or a missing/negative tolerance, and
    ``OutOfRange`` when no point lies inside the previous valid range (nothing to judge).
    """
    if not (tolerance_abs or tolerance_rel):
        raise BadInput("a tolerance is needed: give tolerance_abs and/or tolerance_rel")
    if (tolerance_abs or 0.0) < 0 or (tolerance_rel or 0.0) < 0:
        raise BadInput("tolerances must not be negative")
    r = np.asarray(reading, dtype=float).ravel()
    v = np.asarray(value, dtype=float).ravel()
    if r.shape != v.shape:
        raise BadInput(f"reading has {r.size} entries but value has {v.size}")
    if not np.all(np.isfinite(r) & np.isfinite(v)):
        raise BadInput("reading and value must be finite numbers")
    inside: Mask = np.asarray(previous.in_range(r), dtype=bool)
    if not inside.any():
        lo, hi = previous.valid_range
        raise OutOfRange(
            f"none of the {r.size} new readings lies in the previous valid range "
            f"({lo:.6g} to {hi:.6g}): nothing to judge as found"
        )
    idx = np.flatnonzero(inside)
    predicted = previous.to_value(r[idx])
    error = predicted - v[idx]
    allowed = (tolerance_abs or 0.0) + (tolerance_rel or 0.0) / 100.0 * np.abs(v[idx])
    within = np.abs(error) <= allowed
    share = tolerance_share(error, allowed)
    w = int(np.argmax(share))
    rule = (
        f"As found: the previous calibration converts each new reading inside its valid range; "
        f"the error (converted - reference) must be within "
        f"{describe_tolerance(tolerance_abs, tolerance_rel, unit)} at every such point; readings "
        f"outside the previous valid range are listed, not judged."
    )
    outside = np.flatnonzero(~inside)
    for arr in (idx, outside, within):
        arr.setflags(write=False)
    return AsFound(
        index=idx,
        reading=_frozen(r[idx]),
        value=_frozen(v[idx]),
        predicted=_frozen(predicted),
        error=_frozen(error),
        allowed=_frozen(allowed),
        within=within,
        in_tolerance=bool(within.all()),
        n_judged=int(idx.size),
        n_out=int(np.sum(~within)),
        worst_error=float(error[w]),
        worst_at_reading=float(r[idx][w]),
        worst_at_value=float(v[idx][w]),
        allowed_at_worst=float(allowed[w]),
        tolerance_used_pct=float(100.0 * share[w]),
        outside_index=outside,
        outside_reading=_frozen(r[outside]),
        rule=rule,
    )
