"""line and polynomial against NIST StRD's harder linear problems (tests/data/strd, see its README).

NoInt1: a line through zero. Filip: degree 10 on readings -9..-3, NIST's "higher difficulty"
problem; its raw Vandermonde matrix is numerically singular in double precision. Wampler1: degree
5, an exact fit (certified residual standard deviation 0). Wampler4: degree 5 with residuals of
2.4e5. Parameter B<k> is the engine's c<k> (the coefficient of r**k).

The certified values have 15 significant digits. The floor of the data themselves: the exact
least-squares solution of the file's decimals, read into doubles, matches them to about 14 digits
for Filip and exactly for Wampler1/4 (checked once, off-line, in rational arithmetic). The engine
gets within a digit of that (see shared/families/_monomial.py: Chebyshev basis, refinement with
double-double residuals, compensated Horner evaluation). The requirement is 6 digits (Filip) and
8 (Wampler); the tolerances below are tighter, so that losing the refinement fails a test, yet
they leave at least three digits of margin below what the engine reaches.
"""

from __future__ import annotations

import json
from fractions import Fraction

import numpy as np
import pytest

from shared import Fit, fit
from tests.shared.strd import StrdDataset, load_strd

FILIP_REL = 1e-10  # reached: parameters ~13.5 digits, standard deviations ~14.5, RSD ~15
WAMPLER_REL = 1e-12  # reached: the certified 1.0 exactly; standard deviations and RSD ~14.5


def _check_certified(got: Fit, ref: StrdDataset, rel: float, name: str) -> None:
    """Every certified estimate, standard deviation and the RSD, to ``rel``."""
    assert got.param_names == tuple(f"c{k}" for k in range(len(ref.estimates)))
    for k, (estimate, sd) in enumerate(zip(ref.estimates, ref.std_devs, strict=True)):
        # NIST StRD <name>: certified B<k> estimate and its standard deviation
        assert got.params[f"c{k}"] == pytest.approx(estimate, rel=rel), (name, k)
        assert got.stderr[f"c{k}"] == pytest.approx(sd, rel=rel), (name, k)
    assert got.rse == pytest.approx(ref.residual_sd, rel=rel), name  # certified RSD


# -- NoInt1: y = B1*x ---------------------------------------------------------------------------
def test_noint1_line_through_zero_matches_certified_values() -> None:
    ref = load_strd("NoInt1")
    assert ref.x.shape == (11,)  # NIST StRD NoInt1: 11 observations
    assert ref.first_index == 1 and len(ref.estimates) == 1  # NoInt1 certifies B1 alone
    b1, sd, rsd, dof = ref.estimates[0], ref.std_devs[0], ref.residual_sd, ref.dof
    got = fit("line", ref.x, ref.y, through_zero=True)
    assert got.param_names == ("c1",)
    assert got.params["c1"] == pytest.approx(b1, rel=1e-12)  # NIST StRD NoInt1: certified B1
    assert got.stderr["c1"] == pytest.approx(sd, rel=1e-12)  # ... its standard deviation
    assert got.rse == pytest.approx(rsd, rel=1e-12)  # ... residual standard deviation
    assert got.dof == dof == 10  # NIST StRD NoInt1: residual degrees of freedom (ANOVA table)


# -- Filip: degree 10 ---------------------------------------------------------------------------
def test_filip_degree_10_matches_certified_values() -> None:
    ref = load_strd("Filip")
    assert ref.x.shape == (82,) and len(ref.estimates) == 11
    got = fit("polynomial", ref.x, ref.y, degree=10)
    _check_certified(got, ref, FILIP_REL, "Filip")  # NIST StRD Filip, certified values
    assert got.dof == 71  # NIST StRD Filip: residual degrees of freedom (ANOVA table)


def test_filip_to_value_is_accurate_where_the_terms_cancel() -> None:
    """to_value of the degree 10 fit, against the same coefficients evaluated exactly.

    On Filip's readings the terms c_k r^k reach ~5e6 while the value is ~0.9: plain Horner errs by
    up to ~4e-10 there (millions of ulp). Compensated Horner is within a few ulp.
    """
    ref = load_strd("Filip")
    got = fit("polynomial", ref.x, ref.y, degree=10)
    coefs = [Fraction(got.params[f"c{k}"]) for k in range(11)]
    probe = np.linspace(*got.valid_range, 41)
    exact = np.array([float(sum(c * Fraction(r) ** k for k, c in enumerate(coefs))) for r in probe])
    ulp = np.spacing(np.abs(exact))
    assert np.all(np.abs(got.to_value(probe) - exact) <= 4 * ulp)


def test_filip_json_round_trip_is_exact() -> None:
    ref = load_strd("Filip")
    got = fit("polynomial", ref.x, ref.y, degree=10)
    back = Fit.from_dict(json.loads(json.dumps(got.to_dict())))
    assert back.options == got.options
    assert list(back.params.items()) == list(got.params.items())
    assert back.covariance.tobytes() == got.covariance.tobytes()
    probe = np.linspace(*got.valid_range, 9)
    assert back.to_value(probe).tobytes() == got.to_value(probe).tobytes()


# -- Wampler1, Wampler4: degree 5 ---------------------------------------------------------------
def test_wampler1_exact_fit_is_exact() -> None:
    ref = load_strd("Wampler1")
    got = fit("polynomial", ref.x, ref.y, degree=5)
    for k in range(6):
        # NIST StRD Wampler1: certified B<k> = 1 (exactly), standard deviation 0
        assert got.params[f"c{k}"] == pytest.approx(ref.estimates[k], rel=WAMPLER_REL), k
        # a standard deviation of 0, in the scale of the values: c_k's share at the largest x
        assert got.stderr[f"c{k}"] * np.abs(ref.x).max() ** k <= 1e-12 * np.abs(ref.y).max()
    assert ref.residual_sd == 0.0  # NIST StRD Wampler1: certified RSD 0
    assert got.rse <= 1e-12 * np.abs(ref.y).max()
    assert np.all(np.abs(got.residuals) <= 1e-12 * np.abs(ref.y).max())


def test_wampler4_matches_certified_values() -> None:
    ref = load_strd("Wampler4")
    got = fit("polynomial", ref.x, ref.y, degree=5)
    _check_certified(got, ref, WAMPLER_REL, "Wampler4")  # NIST StRD Wampler4, certified values
    assert got.dof == 15  # NIST StRD Wampler4: residual degrees of freedom (ANOVA table)


# -- the basis for a curve through zero -----------------------------------------------------------
def test_cubic_through_zero_far_from_zero_recovers_its_coefficients() -> None:
    """Readings 1000..1100: r, r^2, r^3 are nearly parallel there; the basis (r/s) T_k(x) is not.

    Invented, noise-free: value = 2 r - 3e-4 r^2 + 1e-8 r^3.
    """
    r = np.linspace(1000.0, 1100.0, 12)
    truth = {"c1": 2.0, "c2": -3e-4, "c3": 1e-8}
    v = truth["c1"] * r + truth["c2"] * r**2 + truth["c3"] * r**3
    got = fit("polynomial", r, v, degree=3, through_zero=True)
    assert got.param_names == ("c1", "c2", "c3")
    for name, value in truth.items():
        assert got.params[name] == pytest.approx(value, rel=1e-7), name
    assert got.rse <= 1e-12 * np.abs(v).max()
