"""Drift between two calibrations, En numbers, and the as-found check.

En reference numbers are read from tests/data/robust_statistics.json, which copies them, with
their source and marker, from the project's reference compilation (CHECK_VALUES 5.1, 5.4;
ISO/IEC 17043 with expanded uncertainties). The simultaneous critical value is checked against
three cases with a closed form (a single reading: the normal and Student-t quantiles; a whole
straight line with known sigma: Working–Hotelling). The fleet simulation is
tests/shared/fleet_simulator.py (assumptions in its docstring). Every random draw uses a fixed
seed, so each test is deterministic.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from shared import BadInput, OutOfRange, fit
from shared.drift import (
    EN_REL_EPS,
    as_found,
    compare,
    could_drift,
    en_number,
    pointwise_floor,
    satisfactory,
    simultaneous_critical,
)
from tests.shared.fleet_simulator import DRIFT_MM, N_DRIFTED, SPAN_MM, calibrate, simulate
from tests.shared.synthetic import (
    DISTANCES_MM,
    R0,
    V0,
    K,
    rangefinder_counts,
    rangefinder_value,
)

REF: dict[str, Any] = json.loads(
    (Path(__file__).parents[1] / "data" / "robust_statistics.json").read_text(encoding="utf-8")
)


# -- En (CHECK_VALUES 5.1, 5.4) -----------------------------------------------------------------
@pytest.mark.parametrize("row", REF["en_examples"]["rows"], ids=lambda r: f"x={r['x']}")
def test_en_examples(row: dict[str, Any]) -> None:
    en = en_number(row["x"], row["U_lab"], row["X"], row["U_ref"])
    if row["en_decimals"] is not None:  # the table's rounding: half a unit of the last digit
        assert en == pytest.approx(row["en"], abs=0.5 * 10.0 ** -row["en_decimals"])
    else:  # the boundary row: 1 in exact arithmetic
        assert en == pytest.approx(row["en"], abs=1e-12)
    assert satisfactory(en) is row["satisfactory"]


def test_en_boundary_is_satisfactory_despite_floating_point() -> None:
    row = REF["en_examples"]["rows"][3]  # CHECK_VALUES 5.4: 0.05 / 0.05
    en = en_number(row["x"], row["U_lab"], row["X"], row["U_ref"])
    assert en == row["en_ieee_double"]  # 1.0000000000000142: naive en <= 1 would say False
    assert satisfactory(en) and satisfactory(-en)
    assert not satisfactory(1.0 + 10 * EN_REL_EPS)  # the tolerance is tiny: 1e-9 relative
    assert REF["en_formula"]["satisfactory_max"] == 1.0  # ISO/IEC 17043: |En| <= 1


def test_en_number_broadcasts_and_refuses_bad_uncertainties() -> None:
    en = en_number([10.03, 9.97], 0.04, 10.00, 0.03)
    np.testing.assert_allclose(en, [0.6, -0.6])  # CHECK_VALUES 5.4 row 1 and its mirror
    with pytest.raises(BadInput):
        en_number(1.0, 0.0, 1.0, 0.0)
    with pytest.raises(BadInput):
        en_number(1.0, -0.1, 1.0, 0.1)


# -- the simultaneous critical value against closed forms ----------------------------------------
R10 = np.arange(10.0)
NOISE = np.array([0.03, -0.05, 0.02, 0.04, -0.03, -0.01, 0.05, -0.04, 0.01, -0.02])


def test_critical_at_one_reading_with_known_sigma_is_the_normal_quantile() -> None:
    a = fit("line", R10, 1 + 2 * R10 + NOISE, u_value=0.05)  # absolute covariance
    b = fit("line", R10, 1 + 2 * R10 - NOISE, u_value=0.08)
    crit = simultaneous_critical(a, b, np.array([3.0]), draws=40_000)
    # one reading, both variances known: |N(0, 1)|, 97.5 % quantile 1.95996 (MC s.e. ~0.01)
    assert crit == pytest.approx(stats.norm.ppf(0.975), abs=0.04)


def test_critical_at_one_reading_with_estimated_sigma_is_student_t() -> None:
    r = np.arange(6.0)
    a = fit("line", r, 1 + 2 * r + NOISE[:6])  # sigma from residuals: dof 4
    b = fit("line", r, 1 + 2 * r, u_value=1e-9)  # a negligible, known variance
    crit = simultaneous_critical(a, b, np.array([2.0]), draws=40_000)
    # d / u(d) is then Student t with 4 dof: 97.5 % quantile 2.7764 (MC s.e. ~0.02)
    assert crit == pytest.approx(stats.t.ppf(0.975, 4), abs=0.08)


def test_critical_over_a_whole_line_is_working_hotelling() -> None:
    r = np.linspace(-1.0, 1.0, 11)  # centred: the constants are uncorrelated
    a = fit("line", r, 1 + 2 * r + np.r_[NOISE, 0.0], u_value=0.05)
    b = fit("line", r, 1 + 2 * r, u_value=0.05)
    # readings spread evenly in the whitened angle atan(r sqrt(n / Sxx)) over (-90, 90) degrees:
    # the supremum over the whole line of |d| / u(d) is the length of a 2-d standard normal,
    # so the 95 % critical value is sqrt(-2 ln 0.05) = 2.4477 (Working–Hotelling, known sigma)
    scale = np.sqrt(np.sum(r**2) / r.size)
    grid = scale * np.tan(np.radians(np.linspace(-89.75, 89.75, 360)))
    crit = simultaneous_critical(a, b, grid, draws=40_000)
    assert crit == pytest.approx(np.sqrt(-2 * np.log(0.05)), abs=0.04)
    # and over the calibrated range only it lies between the one-point and whole-line values
    inside = simultaneous_critical(a, b, np.linspace(-1.0, 1.0, 101), draws=40_000)
    assert stats.norm.ppf(0.975) < inside < crit


# two noisy calibrations of each of several families (invented curves): compare must run for
# any family, the natural-direction callendar_van_dusen and the interpolating table included
TEMPS = np.linspace(0.0, 400.0, 12)
PT_R = 100.2 * (1 + 3.9083e-3 * TEMPS - 5.775e-7 * TEMPS**2)  # IEC 60751 A, B; R0 invented
R12 = np.linspace(0.0, 10.0, 12)
FAMILY_CASES: dict[str, tuple[np.ndarray, np.ndarray, float, dict[str, Any]]] = {
    # family: (readings, values, noise sd, fit keywords)
    "line": (R12, 1.0 + 2.0 * R12, 0.1, {}),
    "polynomial": (R12, 0.5 + 2 * R12 - 0.15 * R12**2 + 0.004 * R12**3, 0.05, {"degree": 3}),
    "power_offset": (R12 + 1, 3.0 * (R12 + 5.0) ** 0.6, 0.02, {}),
    "beta": (
        np.geomspace(700.0, 33000.0, 12),
        1 / (1 / 298.15 + np.log(np.geomspace(700.0, 33000.0, 12) / 1e4) / 3950) - 273.15,
        0.02,
        {},
    ),
    "callendar_van_dusen": (PT_R, TEMPS, 0.01, {"noise": "reading"}),
    "table": (R12[::2], np.sqrt(R12[::2]), 0.01, {"u_value": 0.01}),
}


@pytest.mark.parametrize("family", sorted(FAMILY_CASES))
def test_compare_runs_for_every_kind_of_family(family: str) -> None:
    reading, value, sd, kw = FAMILY_CASES[family]
    rng = np.random.default_rng(len(family))
    noisy_r = kw.get("noise") == "reading"

    def session() -> Any:
        noise = rng.normal(0.0, sd, reading.size)
        return fit(
            family,
            reading + noise if noisy_r else reading,
            value if noisy_r else value + noise,
            **kw,
        )

    a, b = session(), session()
    result = compare(a, b)
    grid = result.reading
    u = np.hypot(a.curve_band(grid, level=None).u, b.curve_band(grid, level=None).u)
    np.testing.assert_allclose(result.sd, u, rtol=1e-12)  # Var(d) = g_p V_p g_p' + g_c V_c g_c'
    # the simultaneous critical value lies above the one-reading normal quantile and far below
    # Scheffé's bound sqrt(p F_{p, nu}) with p = both fits' parameters, nu the smaller dof
    p = len(a.params) + len(b.params)
    nu = min(f.dof if f.sigma_source == "residuals" else np.inf for f in (a, b))
    f_quantile = stats.f.ppf(0.95, p, nu) if np.isfinite(nu) else stats.chi2.ppf(0.95, p) / p
    scheffe = np.sqrt(p * f_quantile)
    assert stats.norm.ppf(0.975) < result.critical < scheffe
    assert np.isfinite(result.en_at_max) and np.isfinite(result.z_simultaneous)


# -- compare: hand-built cases ------------------------------------------------------------------
def _line_band_u(r: np.ndarray, grid: np.ndarray, y: np.ndarray) -> np.ndarray:
    """u of a fitted straight line at ``grid``: s sqrt(1/n + (x - xbar)^2 / Sxx) (CHECK_VALUES
    4.1, the textbook formula), with s from np.polyfit's residuals: not the engine."""
    c1, c0 = np.polyfit(r, y, 1)
    s2 = np.sum((y - c0 - c1 * r) ** 2) / (r.size - 2)
    sxx = np.sum((r - r.mean()) ** 2)
    return np.asarray(np.sqrt(s2 * (1 / r.size + (grid - r.mean()) ** 2 / sxx)))


def test_compare_two_lines_by_hand() -> None:
    y = 1 + 2 * R10 + NOISE
    previous = fit("line", R10, y)
    # least squares is linear in the values: adding 0.5 + 0.1 r to them adds exactly that to
    # the fitted line and leaves the residuals (so the covariance) unchanged
    current = fit("line", R10, y + 0.5 + 0.1 * R10)
    result = compare(previous, current, drift_limit=1.0, unit="mm")
    grid = np.linspace(0.0, 9.0, 201)
    np.testing.assert_allclose(result.reading, grid)
    np.testing.assert_allclose(result.deviation, 0.5 + 0.1 * grid, rtol=1e-9)
    assert result.max_deviation == pytest.approx(1.4, rel=1e-9)  # 0.5 + 0.1 * 9
    assert result.at_reading == 9.0 and result.common_range == (0.0, 9.0)
    assert result.at_value == pytest.approx(float(current.to_value(9.0)), rel=1e-12)
    u = _line_band_u(R10, grid, y)  # the same u for both fits
    sd = np.sqrt(2) * u
    np.testing.assert_allclose(result.sd, sd, rtol=1e-7)
    # En with k = 2 for each curve: 1.4 / sqrt((2 u)^2 + (2 u)^2) at r = 9
    assert result.en_at_max == pytest.approx(1.4 / (2 * sd[-1]), rel=1e-7)
    assert result.z_simultaneous == pytest.approx(np.max((0.5 + 0.1 * grid) / sd), rel=1e-7)
    assert result.significant and result.exceeds_limit and result.drifted
    np.testing.assert_allclose(result.band, result.critical * sd, rtol=1e-7)
    assert not result.deviation.flags.writeable  # a frozen value, like Fit
    assert "1 mm" in result.rule and "simultaneous" in result.rule
    # the same curves with a wider limit: significant, but inside the limit, so not drifted
    wide = compare(previous, current, drift_limit=2.0)
    assert wide.significant and wide.exceeds_limit is False and not wide.drifted
    # without a limit, drifted is the significance alone (and the rule says so)
    bare = compare(previous, current)
    assert bare.exceeds_limit is None and bare.drifted and "No drift limit" in bare.rule


def test_a_curve_against_itself_has_no_drift() -> None:
    f = fit("line", R10, 1 + 2 * R10 + NOISE)
    result = compare(f, f, drift_limit=0.1)
    assert result.max_deviation == 0.0 and result.en_at_max == 0.0
    assert result.z_simultaneous == 0.0 and not result.significant and not result.drifted


def test_compare_uses_the_common_range_and_refuses_disjoint_ones() -> None:
    y = 1 + 2 * R10 + NOISE
    a = fit("line", R10, y)
    b = fit("line", R10 + 4.0, y)  # valid 4 .. 13
    assert compare(a, b, points=11).common_range == (4.0, 9.0)
    c = fit("line", R10 + 20.0, y)  # valid 20 .. 29
    with pytest.raises(OutOfRange, match="do not overlap"):
        compare(a, c)
    with pytest.raises(BadInput):
        compare(a, b, drift_limit=-1.0)


def test_compare_is_reproducible() -> None:
    y = 1 + 2 * R10 + NOISE
    a, b = fit("line", R10, y), fit("line", R10, y + 0.01 * R10)
    assert compare(a, b).critical == compare(a, b).critical  # fixed seed inside


# -- the simulated fleet ------------------------------------------------------------------------
DRIFT_LIMIT = 0.02 * SPAN_MM  # 2 % of span = 14.4 mm; the drifted units moved 5 % = 36 mm


def test_simulated_drift_sensitivity_and_false_alarms(figures) -> None:
    units = simulate()
    results = {u.serial: compare(u.fit_1, u.fit_2, drift_limit=DRIFT_LIMIT) for u in units}
    drifted = [u.serial for u in units if u.kind == "drifted"]
    steady = [u.serial for u in units if u.kind != "drifted"]
    assert len(drifted) == N_DRIFTED and len(steady) >= 190

    def rate(serials: list[str], judge: Any) -> float:
        return sum(bool(judge(results[s])) for s in serials) / len(serials)

    sensitivity = rate(drifted, lambda r: r.drifted)
    false_alarm = rate(steady, lambda r: r.drifted)
    significant = rate(steady, lambda r: r.significant)
    beyond = rate(steady, lambda r: r.exceeds_limit)
    naive_at_max = rate(steady, lambda r: abs(r.en_at_max) > 1)
    naive_any = rate(steady, lambda r: np.max(np.abs(r.deviation) / (2 * r.sd)) > 1)
    naive_flag = rate(steady, lambda r: r.exceeds_limit and abs(r.en_at_max) > 1)
    crit = np.median([r.critical for r in results.values()])
    figures(
        f"\ndrift ({len(units)} units, drift {DRIFT_MM:g} mm = 5 % of span, limit "
        f"{DRIFT_LIMIT:g} mm = 2 % of span, median simultaneous critical {crit:.3f}):"
        f"\n  sensitivity (drifted flagged) {sensitivity:.1%} of {len(drifted)}"
        f"\n  false alarms (undrifted flagged) {false_alarm:.2%} of {len(steady)}"
        f"\n  undrifted beyond the limit {beyond:.2%}; significant (simultaneous, 5 % level) "
        f"{significant:.2%}"
        f"\n  naive |En| > 1 at the largest deviation {naive_at_max:.2%}; naive |En| > 1 "
        f"anywhere on the curve {naive_any:.2%}; naive drift flag {naive_flag:.2%}"
    )
    assert sensitivity >= 0.95  # drifted = beyond the limit AND significant
    assert false_alarm <= 0.02
    # the multiple-comparison point: judging the curve point by point with |En| > 1 gives more
    # false alarms than the simultaneous test, which holds its level (5 %) over the whole curve.
    # Anywhere on the curve the excess is large (about 23 % against 5 % in a 1,500-pair null run
    # of this simulator); at the largest deviation alone it is small (about 6.7 % against 5.2 %:
    # that point mostly sits at the far end, where u(d) is largest, so the selection is mild,
    # and k = 2 instead of Student t at dof 10 adds part of it), so a 196-unit fleet shows it
    # only on a favourable seed such as this one.
    assert naive_any > significant
    assert naive_at_max > significant
    assert significant <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / len(steady))


def test_pointwise_floor_is_the_two_sided_normal_quantile() -> None:
    # NIST/SEMATECH e-Handbook 1.3.6.7.1 (normal table): z = 1.96 leaves 2.5 % in each tail;
    # 1.959964 to more digits (scipy.stats.norm.ppf, the reference library)
    assert pointwise_floor(0.95) == pytest.approx(1.96, abs=5e-5)
    assert pointwise_floor(0.95) == pytest.approx(stats.norm.ppf(0.975), rel=1e-12)
    assert pointwise_floor(0.99) == pytest.approx(stats.norm.ppf(0.995), rel=1e-12)


@pytest.mark.parametrize("limit", [DRIFT_LIMIT, None], ids=["with-limit", "no-limit"])
def test_could_drift_never_misses_a_drift_compare_finds(limit: float | None, figures) -> None:
    """``could_drift`` is a shortcut: False must mean compare says "not drifted", on the
    simulated fleet (drifted and steady units, fixed seed), and it must skip most steady units
    (else it saves nothing)."""
    units = simulate()
    skipped = drifted_skipped = 0
    for u in units:
        quick = could_drift(u.fit_1, u.fit_2, drift_limit=limit)
        full = compare(u.fit_1, u.fit_2, drift_limit=limit)
        assert full.critical >= pointwise_floor(full.level)
        if not quick:
            skipped += 1
            assert not full.drifted, u.serial
            drifted_skipped += u.kind == "drifted"
    steady = sum(u.kind != "drifted" for u in units)
    figures(
        f"\ndrift shortcut ({'limit' if limit else 'no limit'}): {skipped} of {len(units)} "
        f"units told without the simulation ({steady} steady)"
    )
    # with a limit nearly every steady unit stays within it; without one, a steady unit's
    # largest |d| / sd passes 1.96 somewhere on the curve about a quarter of the time (the
    # "naive anywhere" rate above), and those are left to the simulation
    assert skipped >= (0.9 if limit is not None else 0.6) * steady
    # with a limit, a drifted unit (5 % of span against a 2 % limit) is never skipped
    if limit is not None:
        assert drifted_skipped == 0


def test_near_the_noise_the_limit_alone_would_flag_steady_units(figures) -> None:
    # single ADC samples (2 counts, no averaging): at 800 mm one count is about 13 mm, so two
    # calibrations of a steady unit often differ by more than the 14.4 mm limit at the far end
    rng = np.random.default_rng(4317)
    n = 120
    results = []
    for _ in range(n):
        truth = (K * (1 + 0.02 * rng.normal()), R0 * (1 + 0.02 * rng.normal()), V0)
        results.append(
            compare(
                calibrate(rng, truth, samples=1),
                calibrate(rng, truth, samples=1),
                drift_limit=DRIFT_LIMIT,
            )
        )
    beyond = sum(bool(r.exceeds_limit) for r in results) / n
    significant = sum(r.significant for r in results) / n
    flagged = sum(r.drifted for r in results) / n
    figures(
        f"\nsteady units, single 2-count samples ({n}): beyond the {DRIFT_LIMIT:g} mm limit "
        f"{beyond:.1%}; significant {significant:.1%}; drifted (both) {flagged:.1%}"
    )
    assert beyond > 0.2  # the limit alone would raise many false alarms
    # requiring significance as well keeps them at the test's level (5 %; 3 s.e. of slack)
    assert flagged <= significant <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / n)


# -- as found -----------------------------------------------------------------------------------
def test_as_found_with_a_line_by_hand() -> None:
    previous = fit("line", [0.0, 5.0, 10.0], [0.0, 10.0, 20.0])  # value = 2 r, valid 0 .. 10
    # new session: readings 1, 4, 9 (inside) and 12 (outside the previous range)
    found = as_found(previous, [1.0, 4.0, 9.0, 12.0], [2.3, 7.9, 18.0, 24.0], 0.2, 1.0)
    # errors 2 - 2.3 = -0.3, 8 - 7.9 = 0.1, 18 - 18 = 0
    np.testing.assert_allclose(found.error, [-0.3, 0.1, 0.0], atol=1e-9)
    # allowed = 0.2 + 1 % of |value|: 0.223, 0.279, 0.38
    np.testing.assert_allclose(found.allowed, [0.223, 0.279, 0.38], rtol=1e-12)
    assert found.within.tolist() == [False, True, True]
    assert not found.in_tolerance and found.n_out == 1 and found.n_judged == 3
    # worst = largest |error| / allowed: 1.345, 0.358, 0 -> the first point, 134.5 % used
    assert found.worst_error == pytest.approx(-0.3, abs=1e-9)
    assert found.tolerance_used_pct == pytest.approx(100 * 0.3 / 0.223, rel=1e-9)
    assert (found.worst_at_reading, found.worst_at_value) == (1.0, 2.3)
    assert found.allowed_at_worst == pytest.approx(0.223)
    assert found.index.tolist() == [0, 1, 2]
    assert found.outside_index.tolist() == [3] and found.outside_reading.tolist() == [12.0]
    assert "±(0.2 + 1 % of value)" in found.rule


def test_as_found_worst_is_the_largest_share_of_tolerance() -> None:
    """By hand: allowed = 4 + 0.75 % of value. Errors -0.013 at 80 (allowed 4.6, 0.28 % used)
    and -2.4 at 800 (allowed 10, 24 % used): the point at 800 is closest to its limit, though
    the margin (allowed - |error|) is larger there (7.6 against 4.587)."""
    previous = fit("line", [0.0, 500.0, 1000.0], [0.0, 500.0, 1000.0])  # value = reading
    found = as_found(previous, [80.0, 400.0, 800.0], [80.013, 400.0, 802.4], 4.0, 0.75)
    assert found.worst_at_value == 802.4
    assert found.worst_error == pytest.approx(-2.4, abs=1e-9)
    assert found.allowed_at_worst == pytest.approx(4.0 + 0.0075 * 802.4)
    assert found.tolerance_used_pct == pytest.approx(100 * 2.4 / (4.0 + 0.0075 * 802.4))


def test_as_found_rangefinder_offset_by_hand() -> None:
    counts = rangefinder_counts(DISTANCES_MM)
    previous = fit("inverse_offset", counts, DISTANCES_MM)  # noise-free: the truth
    # in service the unit's response moved: every distance now reads 3 mm short, i.e. the
    # reading c now belongs to the distance truth(c) + 3; previous.to_value(c) = truth(c)
    new_counts = counts[2:-2]
    found = as_found(previous, new_counts, rangefinder_value(new_counts) + 3.0, 2.0, None)
    np.testing.assert_allclose(found.error, -3.0, atol=1e-6)  # 3 mm out everywhere
    assert found.n_out == found.n_judged == counts.size - 4 and not found.in_tolerance
    ok = as_found(previous, new_counts, rangefinder_value(new_counts) + 1.0, 2.0, None)
    assert ok.in_tolerance and ok.n_out == 0
    assert ok.worst_error == pytest.approx(-1.0, abs=1e-6)


def test_as_found_refuses_what_it_cannot_judge() -> None:
    previous = fit("line", [0.0, 5.0, 10.0], [0.0, 10.0, 20.0])
    with pytest.raises(OutOfRange, match="nothing to judge"):
        as_found(previous, [11.0, 12.0], [22.0, 24.0], 0.5, None)
    with pytest.raises(BadInput):
        as_found(previous, [1.0], [2.0], None, None)
    with pytest.raises(BadInput):
        as_found(previous, [1.0, 2.0], [2.0], 0.5, None)
