"""Units of one type against each other, robust statistics (ISO 13528), and due dates.

Robust statistics
    ``median_mad``: the median and the scaled median absolute deviation MADe = 1.483 MAD
    (ISO 13528:2005 Annex C, Eq. C.2), or with ``exact=True`` the normal-consistent factor
    1 / Phi^-1(0.75) = 1.482602... (as ``scipy.stats.median_abs_deviation(scale="normal")``).
    ``robust_z``: (x - median) / MADe. ``algorithm_a``: ISO 13528 Annex C.1 (from ISO 5725-5).

Fleet outliers
    ``fleet_outliers`` evaluates every unit's curve at a few reference readings inside the units'
    common valid range and scores each unit against its siblings at each reading with a robust z
    (median / MADe, or Algorithm A's x* / s*). ISO 13528 / ISO/IEC 17043 thresholds: |z| >= 3 is an
    action signal (the unit is flagged), 2 < |z| < 3 a warning signal.

Due dates
    ``due_date``: the type's calibration interval, shortened when the unit's drift history
    projects the drift reaching the tolerance sooner, lengthened (to at most 1.5 times the
    interval, and only on three or more calibrations) when it projects it later.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, timedelta
from typing import Literal, NamedTuple

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from shared.errors import BadInput, OutOfRange
from shared.families.base import Array
from shared.fitting import Fit

MAD_FACTOR = 1.483  # ISO 13528:2005 Annex C, Eq. C.2
MAD_FACTOR_EXACT = float(1.0 / stats.norm.ppf(0.75))  # 1.4826022185056018
HUBER_K = 1.5  # Algorithm A: winsorise at x* +/- 1.5 s*
ALG_A_FACTOR = 1.134  # ISO 13528 / ISO 5725-5: rounded consistency factor for k = 1.5


def _huber_factor(k: float) -> float:
    """1 / sqrt(theta + (1 - theta) k^2 - 2 k phi(k)), theta = 2 Phi(k) - 1: 1.1333927 at 1.5."""
    theta = 2.0 * stats.norm.cdf(k) - 1.0
    return float(1.0 / np.sqrt(theta + (1.0 - theta) * k**2 - 2.0 * k * stats.norm.pdf(k)))


ALG_A_FACTOR_EXACT = _huber_factor(HUBER_K)
Z_ACTION = 3.0  # |z| >= 3: action signal (ISO 13528, ISO/IEC 17043)
Z_WARNING = 2.0  # 2 < |z| < 3: warning signal
MIN_UNITS = 5  # fewer units than this: scores are shown, no unit is flagged
N_PROBES = 5


def _values(x: ArrayLike) -> Array:
    arr = np.asarray(x, dtype=float).ravel()
    if arr.size == 0:
        raise BadInput("no values given")
    if not np.all(np.isfinite(arr)):
        raise BadInput("values must be finite numbers")
    return arr


# -- robust statistics (ISO 13528) --------------------------------------------------------------
class MedianMad(NamedTuple):
    median: float
    made: float  # scaled MAD: factor * median |x - median|


def median_mad(x: ArrayLike, *, exact: bool = False) -> MedianMad:
    """Median and MADe = 1.483 * median |x_i - median| (ISO 13528); ``exact``: 1.482602..."""
    arr = _values(x)
    med = float(np.median(arr))
    mad = float(np.median(np.abs(arr - med)))
    return MedianMad(med, (MAD_FACTOR_EXACT if exact else MAD_FACTOR) * mad)


def robust_z(x: ArrayLike, *, exact: bool = False) -> Array:
    """Robust z-scores (x - median) / MADe (ISO 13528).

    Raises ``BadInput`` when MADe is 0 (half the values or more are equal): the scale is then
    undefined and every differing value would score infinity.
    """
    arr = _values(x)
    med, made = median_mad(arr, exact=exact)
    if made == 0:
        raise BadInput("MADe is 0 (half the values or more are equal): robust z is undefined")
    return np.asarray((arr - med) / made, dtype=float)


StopRule = Literal["iso", "converged"]


@dataclass(frozen=True, slots=True)
class AlgorithmA:
    """Robust average ``x_star`` and robust standard deviation ``s_star`` (ISO 13528 Algorithm A).

    ``history`` is (x*, s*) from the start (median, 1.483 MAD) through every iteration;
    ``iterations`` counts the winsorise-and-update steps; ``stop`` the stopping rule used.
    """

    x_star: float
    s_star: float
    iterations: int
    converged: bool
    stop: StopRule
    history: tuple[tuple[float, float], ...]


def _third_figure_unit(s: float) -> float:
    """The place value of the third significant figure of ``s`` (0.0365 -> 0.0001)."""
    return float(10.0 ** (np.floor(np.log10(abs(s))) - 2))


def algorithm_a(
    x: ArrayLike,
    *,
    stop: StopRule = "iso",
    tol: float = 1e-12,
    max_iter: int = 1000,
    exact: bool = False,
) -> AlgorithmA:
    """ISO 13528 Annex C.1 Algorithm A.

    Start x* = median, s* = 1.483 MAD. Repeat: delta = 1.5 s*; winsorise each x_i to
    [x* - delta, x* + delta]; x* = mean of the winsorised values, s* = 1.134 times their standard
    deviation (divisor p - 1).

    Parameters
    ----------
    stop : ``"iso"`` — the standard's rule: stop when x* and s* no longer change in the third
        significant figure. Read, as in the 2015 wording, as the third significant figure of s*
        and the same decimal place of x*, and "no change" as a change smaller than half a unit in
        that place (rounding-boundary flicker cannot then keep it iterating).
        ``"converged"`` — iterate to a fixed point: relative change of both below ``tol``.
    max_iter : iterations at most; ``converged`` is False when the limit is reached first.
    exact : the exact constants 1 / Phi^-1(0.75) = 1.482602 and the Huber factor 1.133393
        instead of the rounded 1.483 and 1.134 (the R package metRology uses the exact ones).

    Raises ``BadInput`` for fewer than 2 values or when the starting MAD is 0.
    """
    arr = _values(x)
    if arr.size < 2:
        raise BadInput("Algorithm A needs at least 2 values")
    if stop not in ("iso", "converged"):
        raise BadInput(f"stop must be 'iso' or 'converged', not {stop!r}")
    factor = ALG_A_FACTOR_EXACT if exact else ALG_A_FACTOR
    x_star, s_star = median_mad(arr, exact=exact)
    if s_star == 0:
        raise BadInput("the MAD is 0 (half the values or more are equal): Algorithm A cannot start")
    history = [(x_star, s_star)]
    converged = False
    iterations = 0
    while iterations < max_iter:
        delta = HUBER_K * s_star
        w = np.clip(arr, x_star - delta, x_star + delta)
        new_x = float(np.mean(w))
        new_s = float(factor * np.std(w, ddof=1))
        iterations += 1
        history.append((new_x, new_s))
        if stop == "iso":
            half = 0.5 * _third_figure_unit(new_s) if new_s > 0 else 0.0
            done = abs(new_x - x_star) < half and abs(new_s - s_star) < half
        else:
            done = abs(new_x - x_star) <= tol * max(abs(new_x), 1e-300) and abs(
                new_s - s_star
            ) <= tol * max(abs(new_s), 1e-300)
        x_star, s_star = new_x, new_s
        if done or s_star == 0:
            converged = done
            break
    return AlgorithmA(
        x_star=x_star,
        s_star=s_star,
        iterations=iterations,
        converged=converged,
        stop=stop,
        history=tuple(history),
    )


# -- fleet outliers ----------------------------------------------------------------------------
Method = Literal["mad", "algorithm_a"]
Level = Literal["action", "warning", "ok", "not judged"]


@dataclass(frozen=True, slots=True)
class UnitScore:
    """One unit's worst robust z over the probe readings and its signal level."""

    max_abs_z: float
    z_at_max: float  # signed
    at_reading: float
    value_at_max: float
    level: Level


def _frozen(arr: Array) -> Array:
    out = np.array(arr, dtype=float)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, slots=True, eq=False)
class FleetResult:
    """Robust z of every unit's curve at the probe readings (rows: ``serials``; columns: probes).

    ``center`` and ``scale`` are the robust location and standard deviation at each probe (value
    units): median and MADe, or Algorithm A's x* and s*. ``flagged`` are the units with an action
    signal (|z| >= 3), ``warned`` those with a warning (2 < |z| < 3). ``skipped`` lists units left
    out, with the reason. ``judged`` is False when there were too few units to flag any.
    """

    method: Method
    rule: str
    probe_basis: str
    probe_readings: Array
    serials: tuple[str, ...]
    values: Array
    center: Array
    scale: Array
    z: Array
    units: Mapping[str, UnitScore]
    flagged: tuple[str, ...]
    warned: tuple[str, ...]
    skipped: tuple[tuple[str, str], ...]
    judged: bool

    def to_dict(self) -> dict[str, object]:
        return {
            "method": self.method,
            "rule": self.rule,
            "probe_basis": self.probe_basis,
            "probe_readings": self.probe_readings.tolist(),
            "serials": list(self.serials),
            "values": self.values.tolist(),
            "center": self.center.tolist(),
            "scale": self.scale.tolist(),
            "z": self.z.tolist(),
            "units": {
                s: {
                    "max_abs_z": u.max_abs_z,
                    "z_at_max": u.z_at_max,
                    "at_reading": u.at_reading,
                    "value_at_max": u.value_at_max,
                    "level": u.level,
                }
                for s, u in self.units.items()
            },
            "flagged": list(self.flagged),
            "warned": list(self.warned),
            "skipped": [list(s) for s in self.skipped],
            "judged": self.judged,
        }


def _interior(lo: float, hi: float, n: int) -> Array:
    return np.asarray(np.linspace(lo, hi, n + 2)[1:-1], dtype=float)


def choose_probes(
    ranges: Mapping[str, tuple[float, float]],
    probe_readings: ArrayLike | None = None,
    n_probes: int = N_PROBES,
) -> tuple[Array, str, dict[str, str]]:
    """Probe readings for units with these valid ranges (serial -> (low, high), reading units),
    how they were chosen, and the units skipped (serial -> reason); see ``fleet_outliers``."""
    if not ranges:
        raise BadInput("no units to compare")
    if n_probes < 1:
        raise BadInput("at least one probe reading is needed")
    skipped: dict[str, str] = {}
    if probe_readings is not None:
        probes = np.atleast_1d(np.asarray(probe_readings, dtype=float)).ravel()
        if probes.size == 0 or not np.all(np.isfinite(probes)):
            raise BadInput("probe readings must be one or more finite numbers")
        for s, (lo, hi) in ranges.items():
            if probes.min() < lo or probes.max() > hi:
                skipped[s] = (
                    f"valid range {lo:.6g} to {hi:.6g} does not cover the probe readings "
                    f"{probes.min():.6g} to {probes.max():.6g}"
                )
        return probes, "the probe readings given", skipped
    lo = max(r[0] for r in ranges.values())
    hi = min(r[1] for r in ranges.values())
    if lo < hi:
        basis = (
            f"{n_probes} readings evenly spaced inside the common valid range of all units "
            f"({lo:.6g} to {hi:.6g})"
        )
        return _interior(lo, hi, n_probes), basis, skipped
    # never empty: the k-th smallest lower end lies below the k-th smallest upper end
    m_lo = float(np.median([r[0] for r in ranges.values()]))
    m_hi = float(np.median([r[1] for r in ranges.values()]))
    for s, (a, b) in ranges.items():
        if a > m_lo or b < m_hi:
            skipped[s] = (
                f"valid range {a:.6g} to {b:.6g} does not cover the median range "
                f"{m_lo:.6g} to {m_hi:.6g}"
            )
    if len(skipped) == len(ranges):
        raise OutOfRange(
            f"the units' valid ranges have no common part and none covers their median range "
            f"({m_lo:.6g} to {m_hi:.6g}): there is no reading at which to compare them"
        )
    basis = (
        f"the units' valid ranges have no common part: {n_probes} readings evenly spaced inside "
        f"the median range ({m_lo:.6g} to {m_hi:.6g}); units that do not cover it are skipped"
    )
    return _interior(m_lo, m_hi, n_probes), basis, skipped


def _center_scale(x: Array, method: Method, exact: bool) -> tuple[float, float]:
    if method == "mad":
        med, made = median_mad(x, exact=exact)
        return med, made
    found = algorithm_a(x, exact=exact)
    return found.x_star, found.s_star


def fleet_outliers(
    fits: Mapping[str, Fit],
    probe_readings: ArrayLike | None = None,
    *,
    method: Method = "mad",
    exact: bool = False,
    n_probes: int = N_PROBES,
    min_units: int = MIN_UNITS,
) -> FleetResult:
    """Robust z-scores of each unit's curve at a few readings, against its siblings.

    Parameters
    ----------
    fits : serial -> the unit's current fit (units of one sensor type: same reading and value
        units).
    probe_readings : readings (reading units) at which to compare; by default ``n_probes``
        readings evenly spaced inside the common valid range (end points excluded). When the
        units' ranges have no common part, the median range (median of the lower ends to median
        of the upper ends) is used and units that do not cover it are skipped and listed.
    method : ``"mad"`` — z = (value - median) / MADe at each probe; ``"algorithm_a"`` —
        z = (value - x*) / s* from ISO 13528 Algorithm A (ISO stopping rule).
    exact : exact consistency factors instead of ISO's rounded 1.483 / 1.134.
    min_units : with fewer units judged than this, z is still computed but no unit is flagged.

    Each unit's score is its largest |z| over the probes; |z| >= 3 is an action signal
    (``flagged``), 2 < |z| < 3 a warning signal (ISO 13528 / ISO/IEC 17043 thresholds).
    Raises ``BadInput`` for an unknown method, no units, or a scale of 0 at a probe, and
    ``OutOfRange`` when no unit covers the probe readings.
    """
    if method not in ("mad", "algorithm_a"):
        raise BadInput(f"method must be 'mad' or 'algorithm_a', not {method!r}")
    if not fits:
        raise BadInput("no units to compare")
    probes, basis, skipped = choose_probes(
        {s: f.valid_range for s, f in fits.items()}, probe_readings, n_probes
    )
    values = {s: f.to_value(probes) for s, f in fits.items() if s not in skipped}
    return score_fleet(
        values, probes, basis, skipped, method=method, exact=exact, min_units=min_units
    )


def score_fleet(
    values_at_probes: Mapping[str, ArrayLike],
    probes: ArrayLike,
    basis: str,
    skipped: Mapping[str, str] | None = None,
    *,
    method: Method = "mad",
    exact: bool = False,
    min_units: int = MIN_UNITS,
) -> FleetResult:
    """The scoring half of ``fleet_outliers``, from each unit's curve already evaluated at the
    probe readings (serial -> values, value units), e.g. values stored with each unit's current
    fit; ``probes``, ``basis`` and ``skipped`` as ``choose_probes`` gave them. The result is the
    same as ``fleet_outliers`` on the fits themselves."""
    if method not in ("mad", "algorithm_a"):
        raise BadInput(f"method must be 'mad' or 'algorithm_a', not {method!r}")
    probes = np.atleast_1d(np.asarray(probes, dtype=float)).ravel()
    skipped = dict(skipped or {})
    serials = tuple(s for s in values_at_probes if s not in skipped)
    if not serials:
        raise OutOfRange(f"no unit's valid range covers the probe readings ({basis})")
    values = np.array(
        [np.asarray(values_at_probes[s], dtype=float) for s in serials], dtype=float
    ).reshape(len(serials), probes.size)
    judged = len(serials) >= min_units
    center = np.full(probes.size, np.nan)
    scale = np.full(probes.size, np.nan)
    z = np.full(values.shape, np.nan)
    if len(serials) >= 2:
        for j in range(probes.size):
            c, sd = _center_scale(values[:, j], method, exact)
            if sd <= 0:
                raise BadInput(
                    f"the robust standard deviation is 0 at reading {probes[j]:.6g}: half the "
                    "units or more give the same value there (duplicated calibrations?)"
                )
            center[j], scale[j] = c, sd
            z[:, j] = (values[:, j] - c) / sd

    units: dict[str, UnitScore] = {}
    for i, s in enumerate(serials):
        row = z[i]
        if np.all(np.isnan(row)):
            units[s] = UnitScore(np.nan, np.nan, np.nan, np.nan, "not judged")
            continue
        j = int(np.nanargmax(np.abs(row)))
        score = abs(float(row[j]))
        level: Level = "not judged"
        if judged:
            level = "action" if score >= Z_ACTION else "warning" if score > Z_WARNING else "ok"
        units[s] = UnitScore(score, float(row[j]), float(probes[j]), float(values[i, j]), level)

    how = (
        "median and MADe = 1.483 MAD"
        if method == "mad"
        else "ISO 13528 Algorithm A (robust average x*, robust standard deviation s*)"
    )
    if exact:
        how += ", exact consistency factors"
    rule = (
        f"Each unit's curve is evaluated at {probes.size} reading(s) ({basis}); at each reading "
        f"z = (value - robust centre) / robust standard deviation of the units, by {how}. A "
        f"unit's score is its largest |z|: >= {Z_ACTION:g} is an action signal (flagged), "
        f"between {Z_WARNING:g} and {Z_ACTION:g} a warning (ISO 13528 / ISO/IEC 17043)."
    )
    if not judged:
        rule += (
            f" Only {len(serials)} unit(s) could be compared; with fewer than {min_units} the "
            "robust statistics are too uncertain, so no unit is flagged."
        )
    return FleetResult(
        method=method,
        rule=rule,
        probe_basis=basis,
        probe_readings=_frozen(probes),
        serials=serials,
        values=_frozen(values),
        center=_frozen(center),
        scale=_frozen(scale),
        z=_frozen(z),
        units=units,
        flagged=tuple(s for s in serials if units[s].level == "action"),
        warned=tuple(s for s in serials if units[s].level == "warning"),
        skipped=tuple(skipped.items()),
        judged=judged,
    )


# -- due dates ---------------------------------------------------------------------------------
DAYS_PER_YEAR = 365.25
MAX_EXTENSION = 1.5  # a due date is never later than 1.5 x the interval
MIN_TO_LENGTHEN = 3  # calibrations in the history needed before an interval is lengthened
DecidedBy = Literal["interval", "crossing", "cap"]


@dataclass(frozen=True, slots=True)
class DueDate:
    """When the unit is next due, and why.

    ``rate_per_year`` is the drift rate (value units per year) from the history, None without
    one; ``projected_crossing`` the date the drift since ``last_calibrated`` reaches the threshold
    at that rate (``date.max`` if beyond the calendar), None when the rate is not positive.
    ``decided_by`` says which date ``due`` is: ``"interval"`` (last calibration + interval),
    ``"crossing"`` (the projected crossing) or ``"cap"`` (last calibration + max_extension x
    interval).
    """

    due: date
    basis: str
    interval_days: int
    threshold: float
    rate_per_year: float | None
    projected_crossing: date | None
    n_calibrations: int
    shortened: bool
    lengthened: bool
    decided_by: DecidedBy


def due_date(
    last_calibrated: date,
    interval_days: int,
    drift_history: Sequence[tuple[date, float]],
    tolerance: float,
    *,
    drift_limit: float | None = None,
    max_extension: float = MAX_EXTENSION,
    min_to_lengthen: int = MIN_TO_LENGTHEN,
    unit: str = "",
) -> DueDate:
    """The next due date: the interval, adjusted by the drift rate.

    Parameters
    ----------
    last_calibrated : date of the calibration now in use (the drift is taken as 0 then).
    interval_days : the sensor type's calibration interval.
    drift_history : (calibration date, deviation) pairs, CUMULATIVE: each deviation is the
        largest |deviation| of that calibration from one fixed baseline (e.g. the unit's first
        calibration, via ``shared.drift.compare(baseline, fit).max_deviation``), value units. Per
        calibration deviations against the one before are not cumulative: sum them first.
    tolerance : value units; the drift must not reach it in service.
    drift_limit : when given and smaller, the threshold is the drift limit instead.
    max_extension : a due date is never later than this multiple of the interval.
    min_to_lengthen : calibrations needed in the history before the interval may be lengthened.
    unit : value unit, used only in the words of ``basis``.

    Rule. The drift rate is the least-squares slope of |deviation| against time over the
    history (with exactly two calibrations, that is the rate between them). With a positive rate
    the drift since ``last_calibrated`` is projected to reach the threshold after
    threshold / rate; the unit is due at the earlier of that date and the interval, or, with at
    least ``min_to_lengthen`` calibrations, at the earlier of that date and ``max_extension``
    times the interval. A rate of 0 or below is no evidence of drift: the interval (or, with
    enough history, the cap) applies. Fewer than two calibrations: the interval alone. Dates are
    whole days; the projected crossing is rounded down to one.
    """
    if interval_days <= 0:
        raise BadInput(f"the interval must be a positive number of days, got {interval_days}")
    if not (np.isfinite(tolerance) and tolerance > 0):
        raise BadInput(f"the tolerance must be a positive number, got {tolerance}")
    if drift_limit is not None and not (np.isfinite(drift_limit) and drift_limit > 0):
        raise BadInput(f"the drift limit must be a positive number, got {drift_limit}")
    if max_extension < 1:
        raise BadInput("max_extension must be at least 1 (the interval is never cut by it)")
    threshold = min(tolerance, drift_limit) if drift_limit is not None else tolerance
    what = "drift limit" if drift_limit is not None and drift_limit < tolerance else "tolerance"
    sp = " " if unit else ""
    history = sorted(drift_history, key=lambda item: item[0])
    n = len(history)
    dates = [d for d, _ in history]
    if len(set(dates)) != n:
        raise BadInput("the drift history has two entries on the same date")
    mags = np.abs(np.array([m for _, m in history], dtype=float))
    if not np.all(np.isfinite(mags)):
        raise BadInput("drift history deviations must be finite numbers")
    interval_due = last_calibrated + timedelta(days=interval_days)
    if n < 2:
        return DueDate(
            due=interval_due,
            basis=(
                f"interval only ({interval_days} days): "
                f"{'no drift history' if n == 0 else 'one calibration, no drift rate yet'}"
            ),
            interval_days=interval_days,
            threshold=threshold,
            rate_per_year=None,
            projected_crossing=None,
            n_calibrations=n,
            shortened=False,
            lengthened=False,
            decided_by="interval",
        )
    years = np.array([(d - dates[0]).days for d in dates], dtype=float) / DAYS_PER_YEAR
    rate = float(np.polyfit(years, mags, 1)[0])  # value units per year
    how = "the rate between them" if n == 2 else "least-squares slope"
    may_lengthen = n >= min_to_lengthen
    cap_days = int(np.floor(max_extension * interval_days)) if may_lengthen else interval_days
    cap_due = last_calibrated + timedelta(days=cap_days)
    rate_text = f"a drift rate of {rate:.4g}{sp}{unit} per year from {n} calibrations ({how})"
    decided_by: DecidedBy
    if rate <= 0:
        due = cap_due
        crossing = None
        decided_by = "cap" if may_lengthen else "interval"
        basis = f"{rate_text}: no increasing drift; "
        basis += (
            f"interval lengthened to {max_extension:g} x {interval_days} days (the cap)"
            if may_lengthen
            else f"interval only ({interval_days} days; lengthening needs "
            f"{min_to_lengthen} calibrations)"
        )
    else:
        days_to_cross = threshold / rate * DAYS_PER_YEAR
        # whole days, rounded down; 1e-6 day below a whole day is rounding error, not a day less
        days = min(np.floor(days_to_cross + 1e-6), (date.max - last_calibrated).days)
        crossing = last_calibrated + timedelta(days=int(days))
        due = min(crossing, cap_due)
        decided_by = "crossing" if crossing <= cap_due else ("cap" if may_lengthen else "interval")
        basis = (
            f"projected crossing of the {what} {threshold:g}{sp}{unit} on "
            f"{crossing.isoformat()} from {rate_text}"
        )
        if crossing > cap_due:
            basis += (
                f"; later than {max_extension:g} x the interval: capped at {cap_days} days"
                if may_lengthen
                else f"; later than the interval ({interval_days} days), which applies "
                f"(lengthening needs {min_to_lengthen} calibrations)"
            )
    return DueDate(
        due=due,
        basis=basis,
        interval_days=interval_days,
        threshold=threshold,
        rate_per_year=rate,
        projected_crossing=crossing,
        n_calibrations=n,
        shortened=due < interval_due,
        lengthened=due > interval_due,
        decided_by=decided_by,
    )
