"""callendar_van_dusen, steinhart_hart and beta against published reference values.

Reference numbers are read from tests/data/thermal_reference.json, which copies them, with their
source and marker, from the project's reference compilation (CHECK_VALUES sections 1 and 2):
IEC 60751:2008 for the platinum RTD law, Steinhart and Hart (1968) for the thermistor law, a
published Beta worked example. Each check names its section. The laws written out below (in
this file, not taken from the engine) generate the points the fits are given. Every random draw
uses a fixed seed, so each test is deterministic.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from shared import FAMILIES, BadInput, Fit, SingularFit, TooFewPoints, fit
from tests.shared.test_fit_contract import assert_same_fit

REF: dict[str, Any] = json.loads(
    (Path(__file__).parents[1] / "data" / "thermal_reference.json").read_text(encoding="utf-8")
)
KELVIN = 273.15
IEC = REF["iec60751_coefficients"]
IEC_PARAMS = {"R0": IEC["R0_ohm"], "A": IEC["A"], "B": IEC["B"], "C": IEC["C"]}
SH = REF["steinhart_hart_coefficient_set"]
SH_PARAMS = {"A": SH["A"], "B": SH["B"], "C": SH["C"]}
BETA = REF["beta_worked_example"]

# calibration temperatures: -200 .. 850 degC (IEC 60751 range), four of them below 0 degC
RTD_T = np.array([-200.0, -150.0, -100.0, -50.0, 0.0, 50.0, 100.0, 200.0, 300.0, 400.0, 600.0, 850])
NTC_T = np.arange(-40.0, 101.0, 10.0)  # -40 .. 100 degC


# -- the laws, written out from the sources ----------------------------------------------------
def iec60751_r(t: np.ndarray, r0: float = 100.0) -> np.ndarray:
    """R(t) of IEC 60751:2008 (CHECK_VALUES 1.1), ohm."""
    a, b, c = IEC["A"], IEC["B"], IEC["C"]
    t = np.asarray(t, dtype=float)
    return r0 * (1 + a * t + b * t**2 + np.where(t < 0, c * (t - 100) * t**3, 0.0))


def steinhart_hart_r(t: np.ndarray, a: float, b: float, c: float) -> np.ndarray:
    """R(t) by the published inverse of Steinhart–Hart (CHECK_VALUES 2.1, Wikipedia), ohm."""
    x = (a - 1 / (np.asarray(t, dtype=float) + KELVIN)) / c
    y = np.sqrt((b / (3 * c)) ** 3 + x**2 / 4)
    return np.asarray(np.exp(np.cbrt(y - x / 2) - np.cbrt(y + x / 2)))


def beta_r(t: np.ndarray, r0: float, beta: float, t0_c: float = 25.0) -> np.ndarray:
    """R = R0 exp(Beta (1/T - 1/T0)) (CHECK_VALUES 2.1), ohm."""
    return np.asarray(r0 * np.exp(beta * (1 / (np.asarray(t) + KELVIN) - 1 / (t0_c + KELVIN))))


def vector(params: dict[str, float]) -> np.ndarray:
    return np.array(list(params.values()))


def json_round_trip(f: Fit) -> Fit:
    return Fit.from_dict(json.loads(json.dumps(f.to_dict())))


# == Callendar–Van Dusen (IEC 60751) ============================================================
CVD = FAMILIES["callendar_van_dusen"]


def test_cvd_recovers_the_iec60751_coefficients_from_exact_points() -> None:
    # IEC 60751:2008 (CHECK_VALUES 1.1): A, B, C, R0 = 100 ohm; points from the law itself
    f = fit("callendar_van_dusen", iec60751_r(RTD_T), RTD_T)
    assert f.param_names == ("R0", "A", "B", "C")
    assert f.options == {"below_zero": True}  # "auto" resolved: some points are below 0 degC
    for name, true in IEC_PARAMS.items():
        assert f.params[name] == pytest.approx(true, rel=1e-9), name
    assert f.dof == RTD_T.size - 4 and f.monotone and f.excluded == ()
    assert f.valid_range == (iec60751_r(RTD_T).min(), iec60751_r(RTD_T).max())
    np.testing.assert_allclose(f.residuals, 0.0, atol=1e-9)  # degC


@pytest.mark.parametrize(
    "row", REF["iec60751_inverse_pt100"]["rows"], ids=lambda r: str(r["r_ohm"])
)
def test_cvd_evaluate_reproduces_the_inverse_check_values(row: dict[str, float]) -> None:
    # CHECK_VALUES 1.3 (computed from the published IEC 60751 coefficients), to 1e-6 degC
    tol = REF["iec60751_inverse_pt100"]["tolerance_c"]
    got = CVD.evaluate(vector(IEC_PARAMS), np.array([row["r_ohm"]]), {"below_zero": True})
    assert got[0] == pytest.approx(row["t_c"], abs=tol)
    fitted = fit("callendar_van_dusen", iec60751_r(RTD_T), RTD_T)
    assert fitted.to_value(row["r_ohm"])[()] == pytest.approx(row["t_c"], abs=tol)


def test_cvd_reproduces_the_published_pt100_table() -> None:
    # CHECK_VALUES 1.2: IEC 60751 Pt100 table (sensorsci.com, sensingtemp.com), two decimals;
    # within half a unit of the last published digit (0.005 ohm)
    table = REF["iec60751_table_pt100"]
    t = np.array([row["t_c"] for row in table["rows"]])
    published = np.array([row["r_published"] for row in table["rows"]])
    computed = np.array([row["r_computed"] for row in table["rows"]])
    f = fit("callendar_van_dusen", iec60751_r(RTD_T), RTD_T)
    got = CVD.reading_of(vector(dict(f.params)), t, f.options)
    assert np.max(np.abs(got - published)) <= table["tolerance_ohm"]
    np.testing.assert_allclose(got, computed, atol=5e-7)  # the 6-decimal computed column
    # and back: the engine's value for each published resistance rounds to the table's t
    back = f.to_value(published, extrapolate=True)
    slope = f.slope(published)
    assert np.all(np.abs(back - t) <= table["tolerance_ohm"] * np.abs(slope) * (1 + 1e-9))


def test_cvd_without_points_below_zero_has_no_c() -> None:
    # IEC 60751 (CHECK_VALUES 1.1): C acts only below 0 degC; from 0 degC up it is not determined
    above = RTD_T[RTD_T >= 0]
    f = fit("callendar_van_dusen", iec60751_r(above), above)
    assert f.param_names == ("R0", "A", "B") and f.options == {"below_zero": False}
    for name in ("R0", "A", "B"):
        assert f.params[name] == pytest.approx(IEC_PARAMS[name], rel=1e-9), name
    assert f.monotone
    # an excluded sub-zero point does not count: "auto" looks at the used points only
    t = np.r_[-100.0, above]
    g = fit("callendar_van_dusen", iec60751_r(t), t, exclude={0: "reference bath unstable"})
    assert g.param_names == ("R0", "A", "B")
    # C forced without points below 0 degC is a clear error
    with pytest.raises(SingularFit, match="no point lies below 0 degC"):
        fit("callendar_van_dusen", iec60751_r(above), above, below_zero=True)
    # the quadratic law alone may be asked for even with sub-zero points
    h = fit("callendar_van_dusen", iec60751_r(RTD_T), RTD_T, below_zero=False)
    assert h.param_names == ("R0", "A", "B") and h.dof == RTD_T.size - 3


def test_cvd_inverts_exactly_and_its_derivatives_are_analytic() -> None:
    p = vector(IEC_PARAMS)
    t = np.linspace(-200.0, 850.0, 2101)
    r = CVD.reading_of(p, t, {})
    np.testing.assert_allclose(CVD.evaluate(p, r, {}), t, rtol=0, atol=1e-11)
    # slope d t / d R against a central difference of the inversion
    h = 1e-5
    numeric = (CVD.evaluate(p, r + h, {}) - CVD.evaluate(p, r - h, {})) / (2 * h)
    np.testing.assert_allclose(CVD.slope(p, r, {}), numeric, rtol=1e-7)
    # jacobian d t / d params against central differences in each parameter (a step of 1e-4
    # relative: C moves t by little, and t itself is only known to about 3e-14 degC)
    jac = CVD.jacobian(p, r, {})
    for k in range(4):
        step = np.zeros(4)
        step[k] = 1e-4 * abs(p[k])
        num = (CVD.evaluate(p + step, r, {}) - CVD.evaluate(p - step, r, {})) / (2 * step[k])
        np.testing.assert_allclose(jac[:, k], num, rtol=1e-5, atol=1e-9 * np.abs(num).max())
    # B = 0 (a linear RTD) inverts without dividing by B
    linear = np.array([100.0, IEC["A"], 0.0])
    np.testing.assert_allclose(CVD.evaluate(linear, 100.0 * (1 + IEC["A"] * t), {}), t, atol=1e-10)


# -- noise in the reading (the resistance meter) -----------------------------------------------
NOISE_OHM = 0.02
N_SIM = 400
TOL = 3 * np.sqrt(0.95 * 0.05 / N_SIM)  # 3 binomial standard deviations around 95 %


def _noisy_rtd(rng: np.random.Generator, repeats: int = 1) -> tuple[np.ndarray, np.ndarray]:
    t = np.repeat(RTD_T, repeats)
    return iec60751_r(t) + rng.normal(0.0, NOISE_OHM, t.size), t


def test_cvd_reading_noise_is_reported_in_ohm() -> None:
    rng = np.random.default_rng(60751)
    r, t = _noisy_rtd(rng, repeats=2)
    f = fit("callendar_van_dusen", r, t, noise="reading")
    assert f.noise == "reading" and f.sigma_source == "residuals"
    assert f.noise_value_sd == 0.0 and f.noise_reading_sd == f.scale
    assert np.all(f.weights == 1.0)  # an unweighted fit of R on t, its natural direction
    # the scale estimates the 0.02 ohm we added: chi-square bounds at 99.9 %, dof = 24 - 4
    lo, hi = np.sqrt(stats.chi2.ppf([0.0005, 0.9995], f.dof) / f.dof)
    assert lo * NOISE_OHM < f.noise_reading_sd < hi * NOISE_OHM
    # value residuals are the reading residuals over dR/dt (to first order)
    in_ohm = r - CVD.reading_of(vector(dict(f.params)), t, f.options)
    np.testing.assert_allclose(f.residuals, -in_ohm * f.slope(r), rtol=1e-4, atol=1e-12)
    for name, true in IEC_PARAMS.items():
        assert abs(f.params[name] - true) < 3 * f.stderr[name], name
    # a new reading's noise enters a converted value as |dt/dR| * 0.02 ohm
    np.testing.assert_allclose(
        f.new_reading_u([60.0, 300.0]),
        np.abs(f.slope([60.0, 300.0])) * f.noise_reading_sd,
        rtol=1e-12,
    )
    # noise="value" (the default) weights each point by (dt/dR)^2 and reports degC instead
    g = fit("callendar_van_dusen", r, t)
    assert g.noise == "value" and g.noise_reading_sd == 0.0 and g.noise_value_sd == g.scale
    np.testing.assert_allclose(g.weights, g.slope(r) ** 2, rtol=1e-6)


def test_cvd_prediction_interval_covers_95_percent() -> None:
    """400 calibrations (12 points, 0.02 ohm noise) and one new reading each, at -120 and 300 degC.

    The 95 % prediction interval of the value converted from the new reading must cover the true
    temperature 95 % +/- 3 binomial sd (+/- 3.3 %) of the time; seed fixed, so deterministic.
    """
    rng = np.random.default_rng(1968)
    probe_t = np.array([-120.0, 300.0])
    probe_r = iec60751_r(probe_t)
    hits = np.zeros(2)
    for _ in range(N_SIM):
        f = fit("callendar_van_dusen", *_noisy_rtd(rng), noise="reading")
        iv = f.value_interval(probe_r + rng.normal(0.0, NOISE_OHM, 2))
        hits += (iv.lower <= probe_t) & (probe_t <= iv.upper)
    np.testing.assert_allclose(hits / N_SIM, 0.95, atol=TOL)


# == Steinhart–Hart =============================================================================
STH = FAMILIES["steinhart_hart"]


@pytest.mark.parametrize("row", SH["t_from_r"], ids=lambda r: str(r["r_ohm"]))
def test_steinhart_hart_evaluates_the_published_set(row: dict[str, float]) -> None:
    # CHECK_VALUES 2.3: the widely reused 10 kohm set, R -> t computed there to 6 decimals
    got = STH.evaluate(vector(SH_PARAMS), np.array([row["r_ohm"]]), {})
    assert got[0] == pytest.approx(row["t_c"], abs=1e-6)


def test_steinhart_hart_inverse_formula_matches_the_published_r_of_t() -> None:
    # CHECK_VALUES 2.3, t -> R (two decimals): the generator used below reproduces them
    t = np.array([row["t_c"] for row in SH["r_from_t"]])
    r = np.array([row["r_ohm"] for row in SH["r_from_t"]])
    assert np.max(np.abs(steinhart_hart_r(t, *SH_PARAMS.values()) - r)) <= 0.005


def test_steinhart_hart_recovers_the_set_from_exact_points() -> None:
    # CHECK_VALUES 2.3 coefficients; R at -40..100 degC from the published inverse formula (2.1)
    r = steinhart_hart_r(NTC_T, *SH_PARAMS.values())
    f = fit("steinhart_hart", r, NTC_T)
    assert f.param_names == ("A", "B", "C")
    for name, true in SH_PARAMS.items():
        assert f.params[name] == pytest.approx(true, rel=1e-8), name
    assert f.monotone and f.valid_range == (r.min(), r.max())
    np.testing.assert_allclose(f.residuals, 0.0, atol=1e-9)


def test_steinhart_hart_three_point_example() -> None:
    """CHECK_VALUES 2.4 — marked [from memory, arithmetic verified]: the points are the usual
    "10K3" values as the compiler remembered them, not from a page that could be opened.

    Three points determine A, B, C exactly, leaving no degree of freedom, and fit() needs one
    (it estimates the uncertainty from the residuals; only a family that interpolates, the table,
    may do without, and then only with stated uncertainties). So: the family's own solver on the
    three points must give the published coefficients (to their 8 digits), fit() must refuse
    them, and fit() with a fourth consistent point — R(37 degC) = 6014.889 ohm, from the same
    section's checks, consistent to its printed 0.001 ohm (about 4e-6 degC) — must agree.
    """
    ex = REF["steinhart_hart_three_points"]
    t = np.array([p["t_c"] for p in ex["points"]])
    r = np.array([p["r_ohm"] for p in ex["points"]])
    published = {"A": ex["A"], "B": ex["B"], "C": ex["C"]}
    exact = STH.solve(r, t, np.ones(3), {})
    np.testing.assert_allclose(exact.params, vector(published), rtol=1e-7)
    np.testing.assert_allclose(STH.evaluate(exact.params, r, {}), t, atol=1e-9)
    checks = ex["checks"]
    assert STH.evaluate(exact.params, np.array([5000.0]), {})[0] == pytest.approx(
        checks["t_at_5000_ohm_c"], abs=1e-6
    )
    assert steinhart_hart_r(np.array([37.0, 100.0]), *exact.params) == pytest.approx(
        [checks["r_at_37c_ohm"], checks["r_at_100c_ohm"]], abs=5e-4
    )
    with pytest.raises(TooFewPoints, match="needs at least 4"):
        fit("steinhart_hart", r, t)
    f = fit("steinhart_hart", np.r_[r, checks["r_at_37c_ohm"]], np.r_[t, 37.0])
    assert f.dof == 1 and f.rse < 1e-5 and f.monotone
    np.testing.assert_allclose(vector(dict(f.params)), vector(published), rtol=2e-6)


# == Beta =======================================================================================
BETA_FAM = FAMILIES["beta"]


def test_beta_worked_example() -> None:
    # CHECK_VALUES 2.2 (esp32.implrust.com, arithmetic verified): R0 = 10 kohm at 25 degC,
    # Beta = 3950 K, R = 10 475 ohm -> T = 297.109286 K (unrounded), tolerance 1e-6 K
    p = np.array([BETA["R0_ohm"], BETA["beta_k"]])
    t = BETA_FAM.evaluate(p, np.array([BETA["r_ohm"]]), {"t0_c": BETA["t0_c"]})[0]
    assert t + KELVIN == pytest.approx(BETA["T_k"], abs=BETA["tolerance_k"])
    assert t == pytest.approx(BETA["t_c"], abs=BETA["tolerance_k"])


def test_beta_recovers_r0_and_beta_from_generated_points() -> None:
    # CHECK_VALUES 2.2 constants; the further points of 2.2 (two decimals) check the generator
    further = BETA["further_points"]["rows"]
    t_check = np.array([row["t_c"] for row in further])
    r_check = np.array([row["r_ohm"] for row in further])
    assert np.max(np.abs(beta_r(t_check, BETA["R0_ohm"], BETA["beta_k"]) - r_check)) <= 0.005
    r = beta_r(NTC_T, BETA["R0_ohm"], BETA["beta_k"])
    f = fit("beta", r, NTC_T)
    assert f.param_names == ("R0", "B") and f.options == {"t0_c": 25.0}
    assert f.params["R0"] == pytest.approx(BETA["R0_ohm"], rel=1e-10)
    assert f.params["B"] == pytest.approx(BETA["beta_k"], rel=1e-10)
    assert f.monotone
    # with T0 = 0 degC, R0 is the resistance at 0 degC: 33 620.60 ohm (CHECK_VALUES 2.2)
    g = fit("beta", r, NTC_T, t0_c=0.0)
    assert g.params["R0"] == pytest.approx(r_check[0], abs=0.005)
    assert g.params["B"] == pytest.approx(BETA["beta_k"], rel=1e-10)


def test_beta_two_point_formula_is_the_start() -> None:
    # Beta = ln(R1/R2) / (1/T1 - 1/T2) (CHECK_VALUES 2.1): two points solve the law exactly
    t = np.array([0.0, 50.0])
    r = beta_r(t, BETA["R0_ohm"], BETA["beta_k"])
    two_point = np.log(r[0] / r[1]) / (1 / (t[0] + KELVIN) - 1 / (t[1] + KELVIN))
    sol = BETA_FAM.solve(r, t, np.ones(2), {"t0_c": 25.0})
    assert sol.params[1] == pytest.approx(two_point, rel=1e-12)
    assert sol.params[0] == pytest.approx(BETA["R0_ohm"], rel=1e-12)


# == common to the three laws ===================================================================
CASES: list[tuple[str, dict[str, Any], np.ndarray, np.ndarray]] = [
    ("callendar_van_dusen", {}, iec60751_r(RTD_T), RTD_T),
    ("steinhart_hart", {}, steinhart_hart_r(NTC_T, *SH_PARAMS.values()), NTC_T),
    ("beta", {"t0_c": 20.0}, beta_r(NTC_T, BETA["R0_ohm"], BETA["beta_k"]), NTC_T),
]
IDS = [c[0] for c in CASES]


@pytest.mark.parametrize(("family", "options", "reading", "value"), CASES, ids=IDS)
def test_json_round_trip_is_exact(
    family: str, options: dict[str, Any], reading: np.ndarray, value: np.ndarray
) -> None:
    rng = np.random.default_rng(4)
    f = fit(family, reading, value + rng.normal(0.0, 0.01, value.size), **options)
    back = json_round_trip(f)
    assert_same_fit(f, back)
    probe = np.linspace(*f.valid_range, 9)
    assert back.to_value(probe).tobytes() == f.to_value(probe).tobytes()
    a, b = f.value_interval(probe), back.value_interval(probe)
    assert a.lower.tobytes() == b.lower.tobytes() and a.upper.tobytes() == b.upper.tobytes()


@pytest.mark.parametrize(("family", "options", "reading", "value"), CASES, ids=IDS)
def test_slope_and_jacobian_match_finite_differences(
    family: str, options: dict[str, Any], reading: np.ndarray, value: np.ndarray
) -> None:
    f = fit(family, reading, value, **options)
    fam, p, opts = FAMILIES[family], vector(dict(f.params)), f.options
    r = np.geomspace(reading.min(), reading.max(), 41)
    h = 1e-6 * r
    numeric = (fam.evaluate(p, r + h, opts) - fam.evaluate(p, r - h, opts)) / (2 * h)
    np.testing.assert_allclose(fam.slope(p, r, opts), numeric, rtol=1e-6)
    jac = fam.jacobian(p, r, opts)
    for k in range(p.size):
        step = np.zeros(p.size)
        step[k] = 1e-6 * abs(p[k])
        num = (fam.evaluate(p + step, r, opts) - fam.evaluate(p - step, r, opts)) / (2 * step[k])
        np.testing.assert_allclose(jac[:, k], num, rtol=1e-5, atol=1e-8 * np.abs(num).max())


@pytest.mark.parametrize("family", ["steinhart_hart", "beta"])
@pytest.mark.parametrize("bad", [0.0, -10.0])
def test_thermistor_rejects_a_resistance_that_is_not_positive(family: str, bad: float) -> None:
    r = np.r_[bad, steinhart_hart_r(NTC_T, *SH_PARAMS.values())]
    with pytest.raises(BadInput, match=rf"{family}: every resistance must be > 0 ohm.*R = {bad:g}"):
        fit(family, r, np.r_[25.0, NTC_T])


@pytest.mark.parametrize("family", ["steinhart_hart", "beta"])
def test_thermistor_rejects_temperatures_below_absolute_zero(family: str) -> None:
    r = steinhart_hart_r(NTC_T, *SH_PARAMS.values())
    t = NTC_T.copy()
    t[0] = -300.0
    with pytest.raises(BadInput, match=r"above -273\.15 degC"):
        fit(family, r, t)


@pytest.mark.parametrize(
    ("family", "options", "match"),
    [
        ("callendar_van_dusen", {"below_zero": "yes"}, "below_zero must be"),
        ("callendar_van_dusen", {"below_zero": 1}, "below_zero must be"),
        ("beta", {"t0_c": "25"}, "t0_c must be"),
        ("beta", {"t0_c": -300.0}, "t0_c must be above"),
        ("beta", {"t0": 25.0}, "allowed: t0_c"),
        ("steinhart_hart", {"t0_c": 25.0}, "allowed: none"),
    ],
)
def test_bad_options_are_bad_input(family: str, options: dict[str, Any], match: str) -> None:
    with pytest.raises(BadInput, match=match):
        fit(family, steinhart_hart_r(NTC_T, *SH_PARAMS.values()), NTC_T, **options)
