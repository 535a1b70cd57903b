"""fit_many with the noise in the reading and with excluded / fold-back points, against fit().

Both are now batched (``shared.batch_reading``; masked units packed by the number of points they
keep), not handed to fit() one by one. The reference is our own fit(), unit by unit: fit_many
promises its results. Tolerances (our own, no outside source):

* noise="reading": fit() minimises the effective-variance objective with scipy's least_squares
  and then Gauss-Newton steps with the analytic Jacobian; the batch by its own Levenberg-Marquardt.
  Both stop at the rounding floor of the same minimum, so the converted values must agree to
  1e-9 relative (the issue's figure; observed ~1e-11), the parameters to 1e-5 of their standard
  uncertainty (observed 3e-10 for inverse_offset, 2e-6 for a raw cubic whose coefficients are
  ill-conditioned), the covariance to 1e-6 u_i u_j, weights 1e-8 relative, rse and scale 1e-9.
* exclusions with value noise: the same solvers as the unmasked batch, the tolerances of
  tests/shared/test_batch.py.
Every other field (used, excluded and its reasons, valid_range, monotone, dof, noise, options)
must be equal.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest

import shared.batch
from shared import BadInput, Fit, fit, fit_many
from tests.shared.fitcompare import INVERSE_OFFSET, LINEAR, assert_fits_agree
from tests.shared.test_batch import cubic_units, folded_unit, line_units, rangefinder_units

Points = tuple[np.ndarray, np.ndarray]
PREDICTION_REL = 1e-9


@pytest.fixture
def fitted_one_by_one(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[int]]:
    seen: list[int] = []
    one = shared.batch._fit_one

    def spy(i: int, family: str, unit: Any, options: Any) -> Fit:
        seen.append(i)
        return one(i, family, unit, options)

    monkeypatch.setattr(shared.batch, "_fit_one", spy)
    yield seen


def assert_reading_fits_agree(got: Fit, want: Fit) -> None:
    grid = np.linspace(*want.valid_range, 101)
    expected = want.to_value(grid)
    assert np.all(np.abs(got.to_value(grid) - expected) <= PREDICTION_REL * np.abs(expected))
    assert np.allclose(
        got.residuals, want.residuals, rtol=0.0, atol=PREDICTION_REL * np.max(np.abs(want.value))
    )
    u = np.sqrt(np.diag(want.covariance))
    p = np.array(list(got.params.values()))
    q = np.array(list(want.params.values()))
    assert list(got.params) == list(want.params)
    assert np.all(np.abs(p - q) <= 1e-5 * u), np.abs(p - q) / u
    assert np.all(np.abs(got.covariance - want.covariance) <= 1e-6 * np.outer(u, u))
    assert np.allclose(got.weights, want.weights, rtol=1e-8, atol=0.0)
    for name in ("rse", "scale", "noise_reading_sd"):
        assert getattr(got, name) == pytest.approx(getattr(want, name), rel=1e-9), name
    for name in ("used", "reading", "value"):
        assert np.array_equal(getattr(got, name), getattr(want, name)), name
        assert not getattr(got, name).flags.writeable
    same = ("family", "options", "dof", "sigma_source", "noise", "noise_value_sd", "excluded")
    for name in (*same, "valid_range", "monotone"):
        assert getattr(got, name) == getattr(want, name), name


def reading_rangefinders(seed: int, count: int) -> list[Points]:
    rng = np.random.default_rng(seed)
    units = rangefinder_units(rng, count)
    for j in range(3, count, 10):
        units[j] = folded_unit(rng)  # fold-back: two points past the peak, masked
    return units


@pytest.mark.parametrize(
    ("family", "options", "units"),
    [
        ("inverse_offset", {}, reading_rangefinders(1001, 60)),
        (
            "inverse_offset",
            {"exclude": {2: "operator: target slipped"}},
            reading_rangefinders(1002, 30),
        ),
        ("line", {}, line_units(np.random.default_rng(1003), 30)),
        ("line", {"through_zero": True}, line_units(np.random.default_rng(1004), 30)),
        ("polynomial", {"degree": 3}, cubic_units(np.random.default_rng(1005), 30)),
        (
            "polynomial",
            {"degree": 2, "exclude": {0: "warm-up"}},
            cubic_units(np.random.default_rng(1006), 30),
        ),
    ],
)
def test_reading_noise_equals_fit_one_by_one(
    family: str, options: dict[str, Any], units: list[Points], fitted_one_by_one: list[int]
) -> None:
    many = fit_many(family, units, noise="reading", **options)
    for i, (got, (r, v)) in enumerate(zip(many, units, strict=True)):
        try:
            assert_reading_fits_agree(got, fit(family, r, v, noise="reading", **options))
        except AssertionError as exc:
            raise AssertionError(f"unit {i}: {exc}") from None
    assert len(fitted_one_by_one) <= len(units) // 30  # at most one in 30 left to fit()


def test_fold_back_units_are_masked_not_sent_to_fit(fitted_one_by_one: list[int]) -> None:
    units = reading_rangefinders(1007, 40)
    many = fit_many("inverse_offset", units)
    for got, (r, v) in zip(many, units, strict=True):
        assert_fits_agree(got, fit("inverse_offset", r, v), INVERSE_OFFSET)
    assert fitted_one_by_one == []
    folded = [i for i, f in enumerate(many) if any("fold-back" in why for _, why in f.excluded)]
    assert folded == list(range(3, 40, 10))


@pytest.mark.parametrize("family", ["line", "polynomial"])
def test_excluded_points_are_masked(family: str, fitted_one_by_one: list[int]) -> None:
    options: dict[str, Any] = {"degree": 3} if family == "polynomial" else {}
    units = [u for u in cubic_units(np.random.default_rng(1008), 30) if u[0].size >= 9]
    exclude = {1: "operator: target slipped", 4: "reference drifted"}
    many = fit_many(family, units, exclude=exclude, **options)
    for got, (r, v) in zip(many, units, strict=True):
        assert_fits_agree(got, fit(family, r, v, exclude=exclude, **options), LINEAR)
        assert got.excluded == ((1, "operator: target slipped"), (4, "reference drifted"))
    assert fitted_one_by_one == []


def test_an_exclusion_a_unit_does_not_have_raises_as_fit_does() -> None:
    units = line_units(np.random.default_rng(1009), 3)
    with pytest.raises(BadInput, match=r"^unit 0: exclude: point 99 does not exist"):
        fit_many("line", units, exclude={99: "no such point"})
