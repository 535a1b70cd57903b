"""inverse, power, power_offset and exp_rise: NIST StRD certified values, synthetic truths,
fold-back, serialisation, bad input and the coverage of the prediction interval.

Every fit starts from the family's own automatic starting values (fit() takes no start values);
NIST's "Start 1" / "Start 2" columns are never read. Every random draw uses a fixed seed, so each
test is deterministic. The synthetic truths are invented (tests/shared/synthetic_power.py).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import re
import struct
from collections.abc import Callable
from types import MappingProxyType
from typing import Any

import numpy as np
import pytest

from shared import FAMILIES, BadInput, Fit, SingularFit, TooFewPoints, fit
from tests.shared.strd import DATA_DIR, load_strd
from tests.shared.synthetic_power import (
    DISTANCES_MM,
    EXP_READINGS,
    EXP_RISE_OFFSET_TRUTH,
    EXP_RISE_TRUTH,
    INVERSE_TRUTH,
    POWER_OFFSET_TRUTH,
    POWER_TRUTH,
    exp_rise_value,
    inverse_counts,
    inverse_distance,
    power_counts,
    power_distance,
    power_offset_counts,
    power_offset_distance,
    turned_over,
)

NEW_FAMILIES = ("inverse", "power", "power_offset", "exp_rise")


# -- NIST StRD nonlinear files (read by tests/shared/strd.py) -----------------------------------
def test_strd_copies_match_the_sha256_listed_in_the_data_readme() -> None:
    readme = (DATA_DIR.parent / "README.md").read_text(encoding="utf-8")
    for name in ("Misra1a", "BoxBOD", "DanWood"):
        listed = re.search(rf"^([0-9a-f]{{64}})  strd/{name}\.dat$", readme, re.MULTILINE)
        assert listed is not None, name
        digest = hashlib.sha256((DATA_DIR / f"{name}.dat").read_bytes()).hexdigest()
        assert digest == listed.group(1), name


@pytest.mark.parametrize(
    ("name", "n", "first", "last"),
    [
        ("Misra1a", 14, (10.07, 77.6), (81.78, 760.0)),  # NIST StRD Misra1a: data lines 61, 74
        ("BoxBOD", 6, (109.0, 1.0), (224.0, 10.0)),  # NIST StRD BoxBOD: data lines 61, 66
        ("DanWood", 6, (2.138, 1.309), (5.66, 1.68)),  # NIST StRD DanWood: data lines 61, 66
    ],
)
def test_nonlinear_loader_reads_data_and_certified_block(
    name: str, n: int, first: tuple[float, float], last: tuple[float, float]
) -> None:
    ref = load_strd(name)
    assert ref.x.shape == ref.y.shape == (n,)
    assert (ref.y[0], ref.x[0]) == first and (ref.y[-1], ref.x[-1]) == last
    assert ref.first_index == 1 and len(ref.estimates) == len(ref.std_devs) == 2  # b1, b2
    assert ref.dof == n - 2


REL = 1e-6  # at least 6 significant digits of every certified number


@pytest.mark.parametrize(
    ("name", "family"),
    [
        ("Misra1a", "exp_rise"),  # NIST StRD Misra1a, certified values; y = b1*(1-exp(-b2*x))
        ("BoxBOD", "exp_rise"),  # NIST StRD BoxBOD, certified values; same model, Higher level
        ("DanWood", "power"),  # NIST StRD DanWood, certified values; y = b1*x**b2
    ],
)
def test_nonlinear_strd_matches_certified_values(name: str, family: str) -> None:
    ref = load_strd(name)
    got = fit(family, ref.x, ref.y)  # our automatic start; no start values exist in the API
    assert got.param_names == ("a", "b")  # b1 -> a, b2 -> b
    # NIST StRD Misra1a / BoxBOD / DanWood: certified values of b1, b2
    assert got.params["a"] == pytest.approx(ref.estimates[0], rel=REL)
    assert got.params["b"] == pytest.approx(ref.estimates[1], rel=REL)
    # NIST StRD Misra1a / BoxBOD / DanWood: certified standard deviations of b1, b2
    assert got.stderr["a"] == pytest.approx(ref.std_devs[0], rel=REL)
    assert got.stderr["b"] == pytest.approx(ref.std_devs[1], rel=REL)
    # NIST StRD Misra1a / BoxBOD / DanWood: certified residual standard deviation
    assert got.rse == pytest.approx(ref.residual_sd, rel=REL)
    assert got.dof == ref.dof  # NIST StRD: certified degrees of freedom
    assert got.sigma_source == "residuals" and got.excluded == () and got.monotone


# -- the catalog entries --------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("family", "options", "foldback", "names"),
    [
        ("inverse", {}, True, ("k", "v0")),
        ("power", {}, True, ("a", "b")),
        ("power_offset", {}, True, ("a", "r0", "b")),
        ("exp_rise", {}, False, ("a", "b")),
        ("exp_rise", {"offset": True}, False, ("a", "b", "c")),
    ],
)
def test_catalog_entries(
    family: str, options: dict[str, Any], foldback: bool, names: tuple[str, ...]
) -> None:
    fam = FAMILIES[family]
    assert fam.name == family and fam.formula.startswith("value = ")
    assert fam.foldback is foldback
    assert isinstance(fam.options, MappingProxyType)  # the defaults cannot be changed in place
    assert fam.param_names(fam.check_options(options)) == names


JACOBIAN_CASES = [
    ("inverse", {}, [6.0e4, -20.0], np.linspace(80.0, 600.0, 9)),
    ("power", {}, [1.6e5, -1.15], np.linspace(80.0, 600.0, 9)),
    ("power_offset", {}, [3.0e4, -40.0, -1.3], np.linspace(60.0, 200.0, 9)),
    ("exp_rise", {"offset": False}, [250.0, 0.004], np.linspace(20.0, 900.0, 9)),
    ("exp_rise", {"offset": True}, [250.0, 0.004, 12.0], np.linspace(20.0, 900.0, 9)),
]


@pytest.mark.parametrize(("family", "options", "params", "r"), JACOBIAN_CASES)
def test_analytic_jacobian_matches_central_differences(
    family: str, options: dict[str, Any], params: list[float], r: np.ndarray
) -> None:
    fam, p = FAMILIES[family], np.array(params)
    numeric = np.empty((r.size, p.size))
    for j in range(p.size):
        h = 1e-6 * abs(p[j])
        up, down = p.copy(), p.copy()
        up[j] += h
        down[j] -= h
        numeric[:, j] = (fam.evaluate(up, r, options) - fam.evaluate(down, r, options)) / (2 * h)
    np.testing.assert_allclose(fam.jacobian(p, r, options), numeric, rtol=1e-6)


@pytest.mark.parametrize(("family", "options", "params", "r"), JACOBIAN_CASES)
def test_analytic_slope_matches_central_differences(
    family: str, options: dict[str, Any], params: list[float], r: np.ndarray
) -> None:
    fam, p, h = FAMILIES[family], np.array(params), 1e-6 * r
    numeric = (fam.evaluate(p, r + h, options) - fam.evaluate(p, r - h, options)) / (2 * h)
    np.testing.assert_allclose(fam.slope(p, r, options), numeric, rtol=1e-6)


# -- recovering the truth ----------------------------------------------------------------------
Case = tuple[str, dict[str, Any], dict[str, float], np.ndarray, Callable[[np.ndarray], np.ndarray]]
TRUTH_CASES: list[Case] = [
    ("inverse", {}, INVERSE_TRUTH, inverse_counts(DISTANCES_MM), inverse_distance),
    ("power", {}, POWER_TRUTH, power_counts(DISTANCES_MM), power_distance),
    (
        "power_offset",
        {},
        POWER_OFFSET_TRUTH,
        power_offset_counts(DISTANCES_MM),
        power_offset_distance,
    ),
    ("exp_rise", {}, EXP_RISE_TRUTH, EXP_READINGS, exp_rise_value),
    (
        "exp_rise",
        {"offset": True},
        EXP_RISE_OFFSET_TRUTH,
        EXP_READINGS,
        lambda r: exp_rise_value(r, offset=True),
    ),
]
CASE_IDS = ["inverse", "power", "power_offset", "exp_rise", "exp_rise_offset"]
NOISE = 0.5  # value units (mm for the rangefinders)


@pytest.mark.parametrize(
    ("family", "options", "truth", "reading", "value_of"), TRUTH_CASES, ids=CASE_IDS
)
def test_noise_free_points_give_the_truth(
    family: str,
    options: dict[str, Any],
    truth: dict[str, float],
    reading: np.ndarray,
    value_of: Callable[[np.ndarray], np.ndarray],
) -> None:
    f = fit(family, reading, value_of(reading), **options)
    assert f.param_names == tuple(truth)
    for name, true in truth.items():
        assert f.params[name] == pytest.approx(true, rel=1e-8), name
    assert f.excluded == () and f.monotone


@pytest.mark.parametrize(
    ("family", "options", "truth", "reading", "value_of"), TRUTH_CASES, ids=CASE_IDS
)
def test_noisy_points_recover_the_truth_within_three_stderr(
    family: str,
    options: dict[str, Any],
    truth: dict[str, float],
    reading: np.ndarray,
    value_of: Callable[[np.ndarray], np.ndarray],
) -> None:
    rng = np.random.default_rng(2025)
    r = np.repeat(reading, 2)  # two points per level
    v = value_of(r) + rng.normal(0.0, NOISE, r.size)
    f = fit(family, r, v, **options)
    for name, true in truth.items():
        assert abs(f.params[name] - true) < 3 * f.stderr[name], (name, f.params[name], true)
    # the residual scatter estimates the noise we added (dof 21..26)
    assert 0.6 * NOISE < f.rse < 1.4 * NOISE
    assert f.valid_range == (r.min(), r.max())
    assert f.excluded == () and f.used.all() and f.monotone


def test_inverse_accepts_readings_that_are_all_negative() -> None:
    r = -inverse_counts(DISTANCES_MM)  # an inverted ADC: the same law with -k
    f = fit("inverse", r, inverse_distance(-r))
    assert f.params["k"] == pytest.approx(-INVERSE_TRUTH["k"], rel=1e-9)
    assert f.params["v0"] == pytest.approx(INVERSE_TRUTH["v0"], rel=1e-9)


# -- fold-back ---------------------------------------------------------------------------------
MAIN_MM = np.r_[50.0, 60.0, 80.0, DISTANCES_MM]  # the reading peaks near 41 mm, below 50 mm
FOLD_UNITS = {"inverse": inverse_counts, "power": power_counts}


def _turned_over_session(
    counts_of: Callable[[np.ndarray], np.ndarray], below: tuple[float, ...], seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Two readings per reference distance, 0.5 count noise, in no particular order."""
    rng = np.random.default_rng(seed)
    distances = rng.permutation(np.repeat(np.r_[below, MAIN_MM], 2))
    counts = turned_over(counts_of(distances), distances)
    return counts + rng.normal(0.0, 0.5, distances.size), distances


@pytest.mark.parametrize("family", ["inverse", "power"])
@pytest.mark.parametrize("below", [(20.0,), (20.0, 30.0), (10.0, 20.0, 30.0)])
def test_points_below_the_turnover_are_excluded_as_fold_back(
    family: str, below: tuple[float, ...]
) -> None:
    counts, mm = _turned_over_session(FOLD_UNITS[family], below, seed=int(sum(below)))
    f = fit(family, counts, mm)
    assert [i for i, _ in f.excluded] == np.flatnonzero(mm < MAIN_MM[0]).tolist()
    for _, reason in f.excluded:
        assert "fold-back" in reason
    assert f.used.tolist() == (mm >= MAIN_MM[0]).tolist()
    # the valid range ends at the turnover level (the highest reading of the used points)
    assert f.valid_range == (counts[f.used].min(), counts[mm == MAIN_MM[0]].max())
    assert f.monotone


def test_exp_rise_does_not_look_for_fold_back() -> None:
    r = np.r_[EXP_READINGS, 1000.0, 1100.0]
    v = np.r_[exp_rise_value(EXP_READINGS), 200.0, 150.0]  # the last two values turn back
    assert fit("exp_rise", r, v).excluded == ()


# -- serialisation -------------------------------------------------------------------------------
def _bits(x: float) -> bytes:
    return struct.pack("<d", x)


@pytest.mark.parametrize(
    ("family", "options", "truth", "reading", "value_of"), TRUTH_CASES, ids=CASE_IDS
)
def test_json_round_trip_is_exact(
    family: str,
    options: dict[str, Any],
    truth: dict[str, float],
    reading: np.ndarray,
    value_of: Callable[[np.ndarray], np.ndarray],
) -> None:
    rng = np.random.default_rng(7)
    f = fit(family, reading, value_of(reading) + rng.normal(0.0, NOISE, reading.size), **options)
    back = Fit.from_dict(json.loads(json.dumps(f.to_dict())))
    for field in dataclasses.fields(Fit):
        x, y = getattr(f, field.name), getattr(back, field.name)
        if isinstance(x, np.ndarray):
            assert (x.dtype, x.shape, x.tobytes()) == (y.dtype, y.shape, y.tobytes()), field.name
        elif isinstance(x, float):
            assert type(y) is float and _bits(x) == _bits(y), field.name
        elif field.name == "params":
            assert list(x) == list(y), field.name
            assert [_bits(v) for v in x.values()] == [_bits(v) for v in y.values()], field.name
        elif field.name == "valid_range":
            assert [_bits(v) for v in x] == [_bits(v) for v in y], field.name
        else:
            assert type(x) is type(y) and x == y, field.name
    assert back.to_value(reading).tobytes() == f.to_value(reading).tobytes()


# -- bad input -----------------------------------------------------------------------------------
@pytest.mark.parametrize("bad", [0.0, -3.0])
def test_power_rejects_readings_that_are_not_positive(bad: float) -> None:
    r = np.r_[bad, np.linspace(1.0, 10.0, 8)]
    with pytest.raises(BadInput, match=rf"power: every reading must be > 0.*got r = {bad:g}$"):
        fit("power", r, 2.0 * np.abs(r) ** 0.5 + 1.0)


def test_inverse_rejects_a_zero_reading() -> None:
    r = np.linspace(0.0, 10.0, 8)
    with pytest.raises(
        BadInput, match=r"inverse: a reading is 0, where the curve k / r has its pole"
    ):
        fit("inverse", r, r + 1.0)


def test_inverse_rejects_readings_of_both_signs() -> None:
    r = np.linspace(-5.0, 10.0, 8)
    with pytest.raises(BadInput, match=r"both signs.*pole"):
        fit("inverse", r, r + 1.0)


@pytest.mark.parametrize(
    ("family", "options", "n_params"),
    [
        ("inverse", {}, 2),
        ("power", {}, 2),
        ("power_offset", {}, 3),
        ("exp_rise", {}, 2),
        ("exp_rise", {"offset": True}, 3),
    ],
)
def test_too_few_points_raise(family: str, options: dict[str, Any], n_params: int) -> None:
    r = np.linspace(1.0, 5.0, n_params)  # one short of parameters + 1
    with pytest.raises(TooFewPoints, match=f"needs at least {n_params + 1} usable points"):
        fit(family, r, 10.0 / r, **options)


def test_exp_rise_without_saturation_is_singular() -> None:
    r = np.linspace(1.0, 10.0, 10)
    with pytest.raises(SingularFit, match="no saturation"):
        fit("exp_rise", r, 2.0 * r + 0.01 * r**2)  # convex: no rise that levels off


def test_exp_rise_with_flat_points_is_singular() -> None:
    r = np.linspace(1.0, 10.0, 10)
    with pytest.raises(SingularFit, match="rise is complete"):
        fit("exp_rise", r, np.full(r.size, 5.0) + 0.01 * (-1.0) ** np.arange(r.size))


def test_power_offset_that_is_an_exponential_does_not_determine_r0() -> None:
    r = np.linspace(0.0, 10.0, 12)
    with pytest.raises(SingularFit, match="do not determine r0"):
        fit("power_offset", r, 5.0 * np.exp(-0.3 * r))


@pytest.mark.parametrize("family", NEW_FAMILIES)
def test_unknown_option_lists_the_allowed_ones(family: str) -> None:
    r = np.linspace(1.0, 10.0, 8)
    with pytest.raises(BadInput) as err:
        fit(family, r, 10.0 / r, degree=2)
    message = str(err.value)
    assert family in message and "degree" in message
    assert ("offset" if family == "exp_rise" else "none") in message


@pytest.mark.parametrize("offset", [1, "yes", None])
def test_exp_rise_offset_must_be_a_bool(offset: object) -> None:
    with pytest.raises(BadInput, match="offset must be true or false"):
        fit("exp_rise", EXP_READINGS, exp_rise_value(EXP_READINGS), offset=offset)


# -- coverage of the prediction interval --------------------------------------------------------
N_SIM = 400
# with true coverage 0.95 the observed fraction of N_SIM has sd sqrt(0.95 * 0.05 / N_SIM) = 0.011;
# the test allows +-3 sd (a correct interval falls outside on about 0.3 % of seeds; the seed is
# fixed, so the test is deterministic)
TOLERANCE = 3.0 * np.sqrt(0.95 * 0.05 / N_SIM)


@pytest.mark.parametrize(
    ("family", "truth_of", "reading", "noise", "at"),
    [
        ("power", lambda r: 40.0 * r**-0.7, np.linspace(1.0, 20.0, 10), 0.2, 7.3),
        ("exp_rise", exp_rise_value, EXP_READINGS, 1.0, 333.0),
    ],
)
def test_prediction_interval_covers_95_percent(
    family: str,
    truth_of: Callable[[np.ndarray], np.ndarray],
    reading: np.ndarray,
    noise: float,
    at: float,
) -> None:
    """N_SIM simulated calibrations, and one new observation each at reading ``at``.

    The curve band (uncertainty of the constants alone) is checked on the same simulations: it
    should cover the true value at ``at`` 95 % of the time, same tolerance.
    """
    rng = np.random.default_rng(31415)
    true_at = float(truth_of(np.array([at]))[0])
    covered = covered_true = 0
    for _ in range(N_SIM):
        f = fit(family, reading, truth_of(reading) + rng.normal(0.0, noise, reading.size))
        iv = f.value_interval(at)
        covered += bool(iv.lower[0] <= true_at + rng.normal(0.0, noise) <= iv.upper[0])
        band = f.curve_band(at)
        covered_true += bool(band.lower[0] <= true_at <= band.upper[0])
    assert abs(covered / N_SIM - 0.95) <= TOLERANCE, covered / N_SIM
    assert abs(covered_true / N_SIM - 0.95) <= TOLERANCE, covered_true / N_SIM
