"""Robust statistics (ISO 13528), fleet outliers and due dates.

Reference numbers are read from tests/data/robust_statistics.json, which copies them, with their
source and marker, from the project's reference compilation (CHECK_VALUES section 5): the
ISO 13528 constants, a worked fleet example computed from the published formulas (5.3), and the
ISO/IEC 17043 / ISO 13528 z thresholds. Each check names its section. The fleet simulation is
tests/shared/fleet_simulator.py (assumptions in its docstring); every random draw uses a fixed
seed, so each test is deterministic.
"""

from __future__ import annotations

import json
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from shared import BadInput, Fit, OutOfRange, fit
from shared.fleet import (
    ALG_A_FACTOR,
    ALG_A_FACTOR_EXACT,
    MAD_FACTOR,
    MAD_FACTOR_EXACT,
    Z_ACTION,
    Z_WARNING,
    algorithm_a,
    due_date,
    fleet_outliers,
    median_mad,
    robust_z,
)
from tests.shared.fleet_simulator import N_DEFECTIVE, simulate

REF: dict[str, Any] = json.loads(
    (Path(__file__).parents[1] / "data" / "robust_statistics.json").read_text(encoding="utf-8")
)
EX = REF["fleet_worked_example"]  # CHECK_VALUES 5.3
DATA = np.array(EX["data"])
REL = EX["tolerance_rel"]  # 1e-4, as CHECK_VALUES 5.3 advises for Algorithm A


# -- constants (CHECK_VALUES 5.1, 5.2) ----------------------------------------------------------
def test_constants_are_the_published_and_exact_ones() -> None:
    const = REF["robust_constants"]
    assert const["made_factor"]["value"] == MAD_FACTOR  # ISO 13528:2005 Eq. C.2 [published]
    assert const["algorithm_a_factor"]["value"] == ALG_A_FACTOR  # ISO 13528 C.1 [published]
    # [computed from published coefficients], given to 7 significant figures
    assert pytest.approx(const["made_factor_exact"]["value"], abs=5e-7) == MAD_FACTOR_EXACT
    assert pytest.approx(const["algorithm_a_factor_exact"]["value"], abs=5e-8) == (
        ALG_A_FACTOR_EXACT
    )
    assert REF["z_thresholds"]["action_min"] == Z_ACTION  # ISO 13528 / ISO/IEC 17043
    assert REF["z_thresholds"]["satisfactory_max"] == Z_WARNING


# -- median and MADe (CHECK_VALUES 5.1, 5.3) ----------------------------------------------------
def test_exact_made_equals_scipy_normal_scaled_mad() -> None:
    rng = np.random.default_rng(13528)
    for x in (DATA, rng.normal(5.0, 2.0, 101), rng.standard_t(3, 40)):
        _, made = median_mad(x, exact=True)
        # scipy's "normal" scale divides by Phi^-1(0.75): the exact consistency factor
        assert made == pytest.approx(stats.median_abs_deviation(x, scale="normal"), rel=1e-12)


def test_made_with_1483_reproduces_the_worked_example() -> None:
    med, made = median_mad(DATA)
    assert med == pytest.approx(EX["median"], rel=1e-12)  # 5.3: median 10.015
    assert made / MAD_FACTOR == pytest.approx(EX["mad"], rel=1e-9)  # 5.3: MAD 0.025
    assert made == pytest.approx(EX["made_1483"], rel=1e-9)  # 5.3: MADe 0.037075
    # 5.3 gives 0.037065 with 1.4826 (5 significant figures)
    assert median_mad(DATA, exact=True).made == pytest.approx(EX["made_14826"], abs=5e-7)


def test_robust_z_reproduces_the_worked_example() -> None:
    z = robust_z(DATA)
    half = 0.5 * 10.0 ** -EX["robust_z_decimals"]  # the table gives 3 decimals
    np.testing.assert_allclose(z, EX["robust_z_1483"], rtol=0, atol=half)  # 5.3, data order
    assert z[-1] == pytest.approx(15.779, abs=half)  # 5.3: the outlier 10.60
    assert robust_z(DATA, exact=True)[-1] == pytest.approx(EX["robust_z_14826_last"], abs=half)


def test_robust_z_refuses_a_zero_scale() -> None:
    with pytest.raises(BadInput, match="MADe is 0"):
        robust_z([1.0, 1.0, 1.0, 2.0])
    with pytest.raises(BadInput):
        median_mad([])
    with pytest.raises(BadInput):
        median_mad([1.0, np.nan])


# -- Algorithm A (CHECK_VALUES 5.2, 5.3) --------------------------------------------------------
def test_algorithm_a_iterations_match_the_worked_example() -> None:
    found = algorithm_a(DATA, stop="converged")
    start, it1, it2 = found.history[:3]
    assert start == pytest.approx((EX["median"], EX["made_1483"]), rel=1e-9)  # x* = median
    want1, want2 = EX["algorithm_a_iteration_1"], EX["algorithm_a_iteration_2"]
    assert it1 == pytest.approx((want1["x_star"], want1["s_star"]), rel=REL)  # 5.3 iteration 1
    assert it2 == pytest.approx((want2["x_star"], want2["s_star"]), rel=REL)  # 5.3 iteration 2
    conv = EX["algorithm_a_converged"]  # 5.3: 1.483 / 1.134, to 1e-12
    assert found.converged
    assert (found.x_star, found.s_star) == pytest.approx((conv["x_star"], conv["s_star"]), rel=REL)


def test_algorithm_a_iso_stopping_rule_stops_after_iteration_two() -> None:
    found = algorithm_a(DATA)  # stop="iso": third significant figure of s* (and x* alike)
    want = EX["algorithm_a_iso_stopping_rule"]  # 5.3: met after iteration 2, 10.016 / 0.0365
    assert found.stop == "iso" and found.converged
    assert found.iterations == want["after_iteration"]
    assert round(found.x_star, 3) == want["x_star"]
    assert float(f"{found.s_star:.3g}") == want["s_star"]


def test_algorithm_a_exact_constants_and_the_outlier_score() -> None:
    exact = algorithm_a(DATA, stop="converged", exact=True)
    want = EX["algorithm_a_exact_constants"]  # 5.3: 1.482602 / 1.133393
    assert (exact.x_star, exact.s_star) == pytest.approx((want["x_star"], want["s_star"]), rel=REL)
    found = algorithm_a(DATA, stop="converged")
    z = (DATA - found.x_star) / found.s_star
    assert z[-1] == pytest.approx(EX["outlier_z_algorithm_a"], abs=0.005)  # 5.3: 15.99
    assert np.max(np.abs(z[:-1])) <= EX["others_within_abs_z"] + 0.005  # 5.3: within +/-1.27


def test_algorithm_a_refuses_what_it_cannot_start() -> None:
    with pytest.raises(BadInput, match="MAD is 0"):
        algorithm_a([3.0, 3.0, 3.0, 4.0])
    with pytest.raises(BadInput):
        algorithm_a([1.0])
    with pytest.raises(BadInput):
        algorithm_a(DATA, stop="never")  # type: ignore[arg-type]


# -- fleet outliers, hand-built -----------------------------------------------------------------
def _line_unit(slope: float, lo: float = 0.0, hi: float = 10.0) -> Fit:
    """A unit whose curve is value = slope * reading exactly, valid over [lo, hi]."""
    r = np.linspace(lo, hi, 5)
    return fit("line", r, slope * r)


# slopes chosen so the robust z is known by hand: value = slope * r, so at every probe r > 0
# z = (slope - median) / (1.483 MAD) over the slopes. Median 1.00; |deviations| 0.02, 0.01, 0,
# 0, 0.01, 0.035, 0.10 -> MAD 0.01, MADe 0.01483; z(1.035) = 2.360, z(1.10) = 6.743.
SLOPES = {"A": 0.98, "B": 0.99, "C": 1.00, "D": 1.00, "E": 1.01, "W": 1.035, "X": 1.10}


def test_fleet_outliers_flag_and_warn_by_the_iso_thresholds() -> None:
    result = fleet_outliers({s: _line_unit(k) for s, k in SLOPES.items()})
    # default probes: 5 evenly spaced interior readings of the common range 0..10
    np.testing.assert_allclose(result.probe_readings, [10 / 6, 20 / 6, 5.0, 40 / 6, 50 / 6])
    np.testing.assert_allclose(result.scale, 0.01483 * result.probe_readings, rtol=1e-9)
    made = 1.483 * 0.01
    assert result.units["X"].max_abs_z == pytest.approx(0.10 / made, rel=1e-9)  # 6.743
    assert result.units["W"].max_abs_z == pytest.approx(0.035 / made, rel=1e-9)  # 2.360
    assert result.units["A"].z_at_max == pytest.approx(-0.02 / made, rel=1e-9)  # -1.349
    assert result.flagged == ("X",) and result.warned == ("W",)
    assert result.units["X"].level == "action" and result.units["A"].level == "ok"
    assert result.judged and result.skipped == ()
    assert "1.483" in result.rule and ">= 3" in result.rule


def test_fleet_outliers_with_algorithm_a() -> None:
    result = fleet_outliers({s: _line_unit(k) for s, k in SLOPES.items()}, method="algorithm_a")
    slopes = np.array(list(SLOPES.values()))
    for j, r in enumerate(result.probe_readings):  # Algorithm A (ISO stop) on the values at r
        ref = algorithm_a(slopes * r)
        assert (result.center[j], result.scale[j]) == pytest.approx((ref.x_star, ref.s_star))
    assert result.flagged == ("X",)


def test_disjoint_ranges_use_the_median_range_and_skip_who_does_not_cover_it() -> None:
    fits = {s: _line_unit(k) for s, k in list(SLOPES.items())[:6]}
    fits["far"] = _line_unit(1.0, lo=20.0, hi=30.0)  # no common range with the others
    result = fleet_outliers(fits)
    # median of lower ends (0 x 6, 20) = 0; of upper ends (10 x 6, 30) = 10
    np.testing.assert_allclose(result.probe_readings, [10 / 6, 20 / 6, 5.0, 40 / 6, 50 / 6])
    assert [s for s, _ in result.skipped] == ["far"]
    assert "median range" in result.probe_basis and "far" not in result.serials


def test_given_probe_readings_skip_units_that_do_not_cover_them() -> None:
    fits = {s: _line_unit(k) for s, k in SLOPES.items()}
    fits["short"] = _line_unit(1.0, hi=4.0)
    result = fleet_outliers(fits, probe_readings=[2.0, 8.0])
    assert [s for s, _ in result.skipped] == ["short"]
    np.testing.assert_allclose(result.probe_readings, [2.0, 8.0])


def test_too_few_units_are_scored_but_not_flagged() -> None:
    fits = {s: _line_unit(k) for s, k in [("A", 1.0), ("B", 1.01), ("C", 0.99), ("X", 1.5)]}
    result = fleet_outliers(fits)
    assert not result.judged and result.flagged == () and result.warned == ()
    assert {u.level for u in result.units.values()} == {"not judged"}
    assert "no unit is flagged" in result.rule
    assert np.isfinite(result.z).all()  # scores are still shown


def test_fleet_outliers_refuse_bad_requests() -> None:
    with pytest.raises(BadInput):
        fleet_outliers({})
    with pytest.raises(BadInput):
        fleet_outliers({"A": _line_unit(1.0)}, method="zscore")  # type: ignore[arg-type]
    # no common range; the median range 5..6 is covered by no unit
    ranges = [(0.0, 1.0), (0.0, 1.0), (10.0, 11.0), (10.0, 11.0)]
    with pytest.raises(OutOfRange, match="median range"):
        fleet_outliers({str(i): _line_unit(1.0, lo, hi) for i, (lo, hi) in enumerate(ranges)})
    with pytest.raises(OutOfRange):
        fleet_outliers({"A": _line_unit(1.0)}, probe_readings=[20.0])


# -- fleet outliers, simulated ------------------------------------------------------------------
def test_simulated_fleet_outliers_are_found(figures) -> None:
    units = simulate()
    kinds = {u.serial: u.kind for u in units}
    defective = {s for s, k in kinds.items() if k == "defective"}
    normal = [s for s, k in kinds.items() if k != "defective"]  # session 1: none has drifted
    assert len(defective) == N_DEFECTIVE and len(normal) >= 200
    for method in ("mad", "algorithm_a"):
        result = fleet_outliers({u.serial: u.fit_1 for u in units}, method=method)
        found = defective & set(result.flagged)
        false = [s for s in result.flagged if s not in defective]
        rate = len(false) / len(normal)
        figures(
            f"\nfleet outliers ({method}), {len(units)} units: {len(found)}/{len(defective)} "
            f"defective flagged (smallest |z| "
            f"{min(result.units[s].max_abs_z for s in defective):.1f}); false outliers "
            f"{len(false)}/{len(normal)} = {rate:.2%}; warnings {len(result.warned)}"
        )
        assert found == defective  # every defective unit flagged
        assert rate <= 0.01  # at most 1 % false outliers among the normal units


# -- due dates ----------------------------------------------------------------------------------
LAST = date(2025, 1, 1)
D0 = date(2022, 1, 1)


def test_due_date_without_history_is_the_interval() -> None:
    due = due_date(LAST, 365, [], tolerance=2.0)
    assert due.due == LAST + timedelta(days=365)
    assert due.basis.startswith("interval only") and due.rate_per_year is None
    assert due.decided_by == "interval" and not due.shortened and not due.lengthened
    one = due_date(LAST, 365, [(D0, 0.4)], tolerance=2.0)
    assert one.due == LAST + timedelta(days=365) and "one calibration" in one.basis


def test_no_drift_keeps_the_interval_and_lengthens_only_on_enough_history() -> None:
    flat2 = [(D0, 0.3), (D0 + timedelta(days=400), 0.3)]
    due = due_date(LAST, 365, flat2, tolerance=2.0)
    assert due.due == LAST + timedelta(days=365)  # two calibrations: never lengthened
    assert due.rate_per_year == pytest.approx(0.0, abs=1e-12) and not due.lengthened
    assert due.decided_by == "interval"
    flat3 = [*flat2, (D0 + timedelta(days=800), 0.3)]
    due = due_date(LAST, 365, flat3, tolerance=2.0)
    assert due.due == LAST + timedelta(days=547)  # floor(1.5 * 365): the cap
    assert due.lengthened and due.decided_by == "cap"


def test_steady_drift_shortens_to_the_projected_crossing() -> None:
    # cumulative deviations 0, 0.8, 1.6 mm at 0, 400, 800 days: 0.002 mm/day (0.7305 mm/year);
    # the drift since LAST reaches 1.0 mm after 1.0 / 0.002 = 500 days (by hand)
    history = [(D0 + timedelta(days=d), m) for d, m in [(0, 0.0), (400, 0.8), (800, 1.6)]]
    due = due_date(LAST, 730, history, tolerance=1.0, unit="mm")
    assert due.rate_per_year == pytest.approx(0.002 * 365.25, rel=1e-12)
    assert due.projected_crossing == LAST + timedelta(days=500)
    assert due.due == LAST + timedelta(days=500) and due.shortened
    assert due.decided_by == "crossing"
    assert "projected crossing of the tolerance 1 mm on 2026-05-16" in due.basis
    assert "3 calibrations (least-squares slope)" in due.basis
    # a smaller drift limit is the threshold instead: 0.5 / 0.002 = 250 days
    limited = due_date(LAST, 730, history, tolerance=1.0, drift_limit=0.5)
    assert limited.due == LAST + timedelta(days=250) and "drift limit" in limited.basis


def test_two_calibrations_use_the_rate_between_them() -> None:
    # 0.5 -> 1.5 mm in 100 days: 0.01 mm/day; 2.0 mm is reached 200 days after LAST
    fast = [(D0, 0.5), (D0 + timedelta(days=100), 1.5)]
    due = due_date(LAST, 365, fast, tolerance=2.0)
    assert due.due == LAST + timedelta(days=200) and "rate between them" in due.basis
    # 0.5 -> 1.0 mm in 100 days: 400 days, later than the interval, which then applies
    slow = [(D0, 0.5), (D0 + timedelta(days=100), 1.0)]
    due = due_date(LAST, 365, slow, tolerance=2.0)
    assert due.projected_crossing == LAST + timedelta(days=400)
    assert due.due == LAST + timedelta(days=365) and not due.lengthened
    assert due.decided_by == "interval"


def test_slow_drift_lengthens_but_never_beyond_the_cap() -> None:
    # 0.004 mm/day, tolerance 1.8 mm: 450 days, within 1.5 x 365 = 547 days: lengthened
    hist = [(D0 + timedelta(days=d), 0.004 * d) for d in (0, 250, 500)]
    due = due_date(LAST, 365, hist, tolerance=1.8)
    assert due.due == LAST + timedelta(days=450) and due.lengthened
    assert due.decided_by == "crossing"
    # 0.001 mm/day: 1800 days, capped at 547
    hist = [(D0 + timedelta(days=d), 0.001 * d) for d in (0, 250, 500)]
    due = due_date(LAST, 365, hist, tolerance=1.8)
    assert due.projected_crossing == LAST + timedelta(days=1800)
    assert due.due == LAST + timedelta(days=547) and due.decided_by == "cap"
    assert "capped" in due.basis


def test_a_negligible_rate_does_not_overflow_the_calendar() -> None:
    hist = [(D0 + timedelta(days=d), 1e-15 * d) for d in (0, 250, 500)]
    due = due_date(LAST, 365, hist, tolerance=1.0)
    assert due.due == LAST + timedelta(days=547) and due.decided_by == "cap"
    assert due.projected_crossing == date.max  # beyond the calendar: shown as its last day


def test_due_date_refuses_bad_input() -> None:
    with pytest.raises(BadInput):
        due_date(LAST, 0, [], tolerance=1.0)
    with pytest.raises(BadInput):
        due_date(LAST, 365, [], tolerance=0.0)
    with pytest.raises(BadInput):
        due_date(LAST, 365, [(D0, 0.1), (D0, 0.2)], tolerance=1.0)
