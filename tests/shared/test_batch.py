"""fit_many (shared.batch) against fit one by one: the same Fit, field by field.

The reference is our own fit(), unit by unit: fit_many promises its results. Tolerances are
stated per family (``Tolerance``), with the differences observed on these seeds beside them:

* line, polynomial: the batch runs fit()'s own solver on stacked arrays; on these seeds every
  field comes out bit for bit equal (elsewhere the covariance was seen to differ by an ulp, from
  BLAS rounding in the stacked matrix products). Stated: 1e-13 relative.
* inverse_offset: fit() polishes with MINPACK's Levenberg-Marquardt, which stops once it can no
  longer see the sum of squares fall; the batch iterates to the rounding floor (a Newton step
  below 1e-13 of the values' spread). With rho = eps max|value| / rse, the residuals' relative
  rounding level, MINPACK's stopping point lies ~sqrt(rho) standard uncertainties from the
  minimum, and the rse is defined to ~rho. Observed over 800 units drawn as ``well_posed_units``
  draws them: parameters within 1.7 sqrt(rho) u, covariance 0.02 sqrt(rho) u_i u_j, residuals
  0.8 sqrt(rho) rse, rse 0.7 rho. Stated: 10 times those scales, plus 1e-13 relative for rse.
  For the realistic units below (0.5 mm, 2 counts of noise) sqrt(rho) is ~1e-6: the parameters
  agree to ~1e-6 of their standard uncertainty (observed 8e-7; 1e-7 relative for k and r0).

Every other field (reading, value, used, weights, excluded, valid_range, monotone, dof, options,
...) must be equal, and every array read-only as fit() makes it.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import shared.batch
import shared.batch_inverse_offset
from shared import (
    BadInput,
    CalibrationError,
    Fit,
    SingularFit,
    TooFewPoints,
    fit,
    fit_many,
)
from tests.shared.fitcompare import EXACT, INVERSE_OFFSET, LINEAR, Tolerance, assert_fits_agree
from tests.shared.synthetic import (
    DISTANCES_MM,
    peaked_counts,
    rangefinder_counts,
    rangefinder_value,
)

Points = tuple[np.ndarray, np.ndarray]


def assert_many_agree(family: str, units: list[Points], tol: Tolerance, **options: Any) -> None:
    many = fit_many(family, units, **options)
    assert len(many) == len(units)
    for i, (got, (r, v)) in enumerate(zip(many, units, strict=True)):
        try:
            assert_fits_agree(got, fit(family, r, v, **options), tol)
        except AssertionError as exc:
            raise AssertionError(f"unit {i}: {exc}") from None


@pytest.fixture
def fitted_one_by_one(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[int]]:
    """The indices of the units fit_many hands to fit() one by one (the fallback path)."""
    seen: list[int] = []
    one = shared.batch._fit_one

    def spy(i: int, family: str, unit: Any, options: Any) -> Fit:
        seen.append(i)
        return one(i, family, unit, options)

    monkeypatch.setattr(shared.batch, "_fit_one", spy)
    yield seen


# -- synthetic units (fixed seeds; invented constants, see tests/shared/synthetic.py) ---------
def line_units(rng: np.random.Generator, count: int) -> list[Points]:
    """Units of 4..20 points over a 12-bit ADC range, each its own offset and gain."""
    units = []
    for _ in range(count):
        n = int(rng.choice([4, 7, 12, 15, 20]))
        r = np.sort(rng.uniform(0.0, 4095.0, n))
        c0, c1 = rng.normal(12.5, 1.0), rng.normal(0.0244, 0.001)
        units.append((r, c0 + c1 * r + rng.normal(0.0, 0.3, n)))
    return units


def cubic_units(rng: np.random.Generator, count: int) -> list[Points]:
    """Units of 6..15 points over counts 1000..3000 (far from zero), a cubic of (r - 1000)/2000."""
    units = []
    for _ in range(count):
        n = int(rng.choice([6, 9, 15]))
        r = np.sort(rng.uniform(1000.0, 3000.0, n))
        x = (r - 1000.0) / 2000.0
        coef = rng.normal([1.0, 20.0, -3.0, 0.5], 0.1)
        units.append((r, np.polynomial.polynomial.polyval(x, coef) + rng.normal(0.0, 1e-3, n)))
    return units


def rangefinder_units(rng: np.random.Generator, count: int) -> list[Points]:
    """Rangefinders at 10..14 of the 14 distances, constants a few % apart, value noise 0.5 mm
    or reading noise 2 counts, in shuffled order."""
    units = []
    for j in range(count):
        n = int(rng.choice([10, 12, 14]))
        mm = np.sort(rng.choice(DISTANCES_MM, n, replace=False))
        k, r0, v0 = 52000.0 * rng.normal(1.0, 0.03), rng.normal(-95.0, 3.0), rng.normal(-18.0, 2.0)
        counts = -r0 + k / (mm - v0)
        if j % 2:
            counts = counts + rng.normal(0.0, 2.0, n)
        else:
            mm = mm + rng.normal(0.0, 0.5, n)
        order = rng.permutation(n)
        units.append((counts[order], mm[order]))
    return units


def folded_unit(rng: np.random.Generator) -> Points:
    """A unit read also below its turnover (20, 30 mm): fit() excludes those as fold-back."""
    mm = np.r_[20.0, 30.0, 42.0, 60.0, 80.0, DISTANCES_MM]
    return peaked_counts(mm) + rng.normal(0.0, 0.5, mm.size), mm


@st.composite
def well_posed_units(draw: st.DrawFn) -> tuple[str, dict[str, Any], list[Points]]:
    """(family, options, units): 1..6 units of one family drawn as test_fit_contract's
    ``well_posed`` draws one (spread readings, a wide range of scales, noise 1e-6..1e-3 of the
    span), each with its own point count, constants and noise."""
    family = draw(st.sampled_from(["line", "polynomial", "inverse_offset"]))
    options: dict[str, Any] = {}
    if family == "line":
        options["through_zero"] = draw(st.booleans())
        n_params = 1 if options["through_zero"] else 2
    elif family == "polynomial":
        options["degree"] = draw(st.integers(2, 4))
        n_params = options["degree"] + 1
    else:
        n_params = 3
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    units = []
    for _ in range(draw(st.integers(1, 6))):
        n = int(rng.integers(n_params + 2, 31))
        lo, span = rng.uniform(-1e3, 1e3), 10.0 ** rng.uniform(-1.0, 4.0)
        grid = np.linspace(0.0, 1.0, n)
        grid[1:-1] += rng.uniform(-0.3, 0.3, n - 2) / (n - 1)
        r = rng.permutation(lo + span * grid)
        if family == "inverse_offset":
            k = 10.0 ** rng.uniform(2.0, 6.0) * rng.choice([-1.0, 1.0])
            truth = k / (r + rng.uniform(0.05, 3.0) * span - lo) + rng.uniform(-1e3, 1e3)
        elif options.get("through_zero"):
            truth = rng.uniform(-1e2, 1e2) * r
        else:
            truth = np.polynomial.polynomial.polyval(
                (r - lo) / span, rng.uniform(-1e2, 1e2, n_params)
            )
        noise = 10.0 ** rng.uniform(-6.0, -3.0) * (float(np.ptp(truth)) or 1.0)
        units.append((r, truth + rng.normal(0.0, noise, n)))
    return family, options, units


# -- the batch path equals fit() ---------------------------------------------------------------
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=well_posed_units())
def test_fit_many_equals_fit_on_well_posed_units(
    data: tuple[str, dict[str, Any], list[Points]],
) -> None:
    family, options, units = data
    tol = INVERSE_OFFSET if family == "inverse_offset" else LINEAR
    for i, (r, v) in enumerate(units):
        try:
            fit(family, r, v, **options)
        except CalibrationError as exc:  # fit_many must raise it too, for the first such unit
            with pytest.raises(type(exc), match=f"^unit {i}: "):
                fit_many(family, units, **options)
            return
    assert_many_agree(family, units, tol, **options)


@pytest.mark.parametrize("through_zero", [False, True])
def test_line_equals_fit_one_by_one(through_zero: bool, fitted_one_by_one: list[int]) -> None:
    units = line_units(np.random.default_rng(101), 40)
    assert_many_agree("line", units, LINEAR, through_zero=through_zero)
    assert fitted_one_by_one == []  # every unit took the batch path


@pytest.mark.parametrize("through_zero", [False, True])
def test_cubic_equals_fit_one_by_one(through_zero: bool, fitted_one_by_one: list[int]) -> None:
    units = cubic_units(np.random.default_rng(202), 40)
    assert_many_agree("polynomial", units, LINEAR, degree=3, through_zero=through_zero)
    assert fitted_one_by_one == []


def test_ill_conditioned_polynomial_equals_fit_one_by_one() -> None:
    """Degree 8 on readings 1000..1010: the raw monomial basis is near singular there."""
    rng = np.random.default_rng(303)
    units = []
    for _ in range(12):
        r = np.sort(rng.uniform(1000.0, 1010.0, 20))
        units.append((r, np.sin((r - 1000.0) / 3.0) + rng.normal(0.0, 1e-6, r.size)))
    assert_many_agree("polynomial", units, LINEAR, degree=8)


def test_inverse_offset_equals_fit_one_by_one(fitted_one_by_one: list[int]) -> None:
    rng = np.random.default_rng(404)
    units = rangefinder_units(rng, 40)
    units[13] = folded_unit(rng)
    assert_many_agree("inverse_offset", units, INVERSE_OFFSET)
    assert fitted_one_by_one == []  # the folded unit too is batched (masked)
    folded = fit_many("inverse_offset", units)[13]
    assert [i for i, why in folded.excluded if "fold-back" in why] == [0, 1]


def test_noise_free_inverse_offset_reaches_the_truth() -> None:
    """Exact points: the batch finds the invented constants to the rounding floor."""
    counts = rangefinder_counts(DISTANCES_MM)
    (got,) = fit_many("inverse_offset", [(counts, rangefinder_value(counts))])
    assert got.params == pytest.approx({"k": 52000.0, "r0": -95.0, "v0": -18.0}, rel=1e-10)


def test_repeated_reference_values_are_checked_for_fold_back_one_by_one() -> None:
    rng = np.random.default_rng(505)
    mm = np.repeat(DISTANCES_MM, 2)
    units = [(rangefinder_counts(mm) + rng.normal(0.0, 1.0, mm.size), mm) for _ in range(6)]
    assert_many_agree("inverse_offset", units, INVERSE_OFFSET)


def test_single_precision_scan_picks_the_double_precision_best() -> None:
    """The scan's shortcut (single precision, then a window in double) finds exactly the best
    point, and the costs around it, of the whole grid scanned in double precision."""
    rng = np.random.default_rng(1212)
    mm = DISTANCES_MM
    kinds = {
        "noisy": [scaled_rangefinder(rng, 0.5) for _ in range(300)],
        "noise-free": [(rangefinder_counts(mm) * rng.normal(1.0, 0.01), mm) for _ in range(50)],
        "straight": [(mm, 900.0 - 1.25 * mm + rng.normal(0.0, 1e-3, mm.size)) for _ in range(20)],
        "wide": [(r, v) for r, v in rangefinder_units(rng, 200) if r.size == 14],
    }
    grid = np.exp(np.log(shared.batch_inverse_offset.SCAN))
    for kind, units in kinds.items():
        r, v = np.array([u[0] for u in units]), np.array([u[1] for u in units])
        r_min, span, dv = r.min(axis=1), np.ptp(r, axis=1), v - v.mean(axis=1, keepdims=True)
        trial = grid * span[:, None] - r_min[:, None]
        whole = shared.batch_inverse_offset._scan_costs(r, dv, trial)
        best, around, finite = shared.batch_inverse_offset._scan(r, dv, r_min, span)
        assert np.array_equal(best, np.argmin(whole, axis=1)), kind
        mid = np.clip(best, 1, grid.size - 2)[:, None] + np.arange(-1, 2)
        assert np.array_equal(around, np.take_along_axis(whole, mid, axis=1)), kind
        assert np.array_equal(finite, np.isfinite(whole).all(axis=1)), kind


def scaled_rangefinder(rng: np.random.Generator, noise_mm: float) -> Points:
    """The synthetic rangefinder with its counts scaled by a few %, value noise ``noise_mm``."""
    counts = rangefinder_counts(DISTANCES_MM) * rng.normal(1.0, 0.02)
    return counts, rangefinder_value(counts) + rng.normal(0.0, noise_mm, counts.size)


# -- what goes to fit() one by one ---------------------------------------------------------------
@pytest.mark.parametrize(
    "options",
    [
        {"u_value": 0.3},
        {"u_reading": 1.0},
    ],
)
def test_unbatched_options_give_fit_exactly(
    options: dict[str, Any], fitted_one_by_one: list[int]
) -> None:
    units = line_units(np.random.default_rng(606), 8)
    assert_many_agree("line", units, EXACT, **options)
    assert fitted_one_by_one == list(range(8))


def test_other_families_give_fit_exactly(fitted_one_by_one: list[int]) -> None:
    rng = np.random.default_rng(707)
    r = np.linspace(1.0, 10.0, 12)
    units = [
        (r, 3.0 * r ** rng.normal(1.5, 0.05) + rng.normal(0.0, 0.01, r.size)) for _ in range(3)
    ]
    assert_many_agree("power", units, EXACT)
    assert fitted_one_by_one == [0, 1, 2]


def test_accepts_any_iterable_and_nothing() -> None:
    units = line_units(np.random.default_rng(808), 5)
    from_generator = fit_many("line", ((r, v) for r, v in units))
    for got, (r, v) in zip(from_generator, units, strict=True):
        assert_fits_agree(got, fit("line", r, v), LINEAR)
    lists = [(r.tolist(), v.tolist()) for r, v in units]
    for got, (r, v) in zip(fit_many("line", lists), units, strict=True):
        assert_fits_agree(got, fit("line", r, v), LINEAR)
    assert fit_many("line", []) == []
    assert fit_many("inverse_offset", iter([])) == []


def test_each_fit_owns_its_options() -> None:
    a, b = fit_many("polynomial", cubic_units(np.random.default_rng(909), 2), degree=3)
    assert a.options == b.options == {"degree": 3, "through_zero": False}
    assert a.options is not b.options


# -- a unit fit() cannot fit: the same error, with its index -------------------------------------
def _bad_units(family: str) -> list[Points]:
    rng = np.random.default_rng(1001)
    if family == "line":
        return line_units(rng, 12)
    if family == "polynomial":
        return cubic_units(rng, 12)
    return rangefinder_units(rng, 12)


DEGENERATE: dict[str, Callable[[np.ndarray, np.ndarray], Points]] = {
    "equal readings": lambda r, v: (np.full(r.size, r[0]), v),
    "too few points": lambda r, v: (r[:2], v[:2]),
    "a NaN": lambda r, v: (np.r_[r[:-1], np.nan], v),
    "lengths differ": lambda r, v: (r, v[:-1]),
}
EXPECTED = {
    "equal readings": (BadInput, "all usable readings are equal"),
    "too few points": (TooFewPoints, "needs at least"),
    "a NaN": (BadInput, "must be finite"),
    "lengths differ": (BadInput, "entries but value has"),
}


@pytest.mark.parametrize("family", ["line", "polynomial", "inverse_offset"])
@pytest.mark.parametrize("case", list(DEGENERATE))
def test_a_degenerate_unit_raises_fits_error_with_its_index(family: str, case: str) -> None:
    options = {"degree": 3} if family == "polynomial" else {}
    units = _bad_units(family)
    units[7] = DEGENERATE[case](*units[7])
    error, words = EXPECTED[case]
    with pytest.raises(error) as from_fit:
        fit(family, *units[7], **options)
    with pytest.raises(error) as from_many:
        fit_many(family, units, **options)
    assert type(from_many.value) is type(from_fit.value)
    assert str(from_many.value) == f"unit 7: {from_fit.value}"
    assert words in str(from_many.value)


def test_the_first_failing_unit_is_reported() -> None:
    """Unit 4 fails only in the solve (a straight line: no curvature), unit 9 at once (NaN)."""
    units = rangefinder_units(np.random.default_rng(1102), 12)
    r = np.linspace(200.0, 600.0, 12)
    units[4] = (r, 900.0 - 1.25 * r)
    units[9] = (np.r_[np.nan, units[9][0][1:]], units[9][1])
    with pytest.raises(SingularFit, match=r"^unit 4: inverse_offset: the points show no curvature"):
        fit_many("inverse_offset", units)
    units[4] = units[5]
    with pytest.raises(BadInput, match=r"^unit 9: reading and value must be finite"):
        fit_many("inverse_offset", units)


def test_options_are_checked_before_any_unit() -> None:
    with pytest.raises(BadInput, match="noise must be"):
        fit_many("line", [], noise="values")
    with pytest.raises(BadInput, match="degree"):
        fit_many("polynomial", [], degree=11)
