"""The engine against NIST StRD certified values (tests/data/strd, see tests/data/README.md).

StRD parameter B<k> multiplies x**k, as the engine's c<k> multiplies r**k. The certified values are
given to 15 digits; the engine must reproduce estimates, their standard deviations and the residual
standard deviation to at least 9 significant digits.
"""

from __future__ import annotations

import pytest

from shared import fit
from tests.shared.strd import fortran_float, load_strd

REL = 1e-9


def test_loader_reads_fortran_numbers() -> None:
    assert fortran_float(".591E0") == 0.591
    assert fortran_float("0.429796848199937E-03") == 0.429796848199937e-3
    assert fortran_float("-0.316081871345029E-14") == -0.316081871345029e-14
    assert fortran_float("1.5D2") == 150.0


@pytest.mark.parametrize(("name", "n", "p"), [("Norris", 36, 2), ("Pontius", 40, 3)])
def test_loader_reads_header_and_data(name: str, n: int, p: int) -> None:
    ref = load_strd(name)
    assert ref.x.shape == ref.y.shape == (n,)
    assert len(ref.estimates) == len(ref.std_devs) == p
    assert ref.residual_sd > 0


def test_loader_norris_first_and_last_rows() -> None:
    ref = load_strd("Norris")  # NIST StRD Norris: data lines 61 and 96 of the file
    assert (ref.y[0], ref.x[0]) == (0.1, 0.2)
    assert (ref.y[-1], ref.x[-1]) == (0.2, 0.5)


def test_norris_line_matches_certified_values() -> None:
    ref = load_strd("Norris")
    got = fit("line", ref.x, ref.y)
    assert got.param_names == ("c0", "c1")
    # NIST StRD Norris: certified B0, B1 estimates
    assert got.params["c0"] == pytest.approx(ref.estimates[0], rel=REL)
    assert got.params["c1"] == pytest.approx(ref.estimates[1], rel=REL)
    # NIST StRD Norris: certified standard deviations of B0, B1
    assert got.stderr["c0"] == pytest.approx(ref.std_devs[0], rel=REL)
    assert got.stderr["c1"] == pytest.approx(ref.std_devs[1], rel=REL)
    # NIST StRD Norris: certified residual standard deviation
    assert got.rse == pytest.approx(ref.residual_sd, rel=REL)
    assert got.dof == 34  # NIST StRD Norris: residual degrees of freedom (ANOVA table)
    assert got.sigma_source == "residuals"


def test_pontius_quadratic_matches_certified_values() -> None:
    ref = load_strd("Pontius")
    got = fit("polynomial", ref.x, ref.y, degree=2)
    assert got.param_names == ("c0", "c1", "c2")
    # NIST StRD Pontius: certified B0, B1, B2 estimates
    assert got.params["c0"] == pytest.approx(ref.estimates[0], rel=REL)
    assert got.params["c1"] == pytest.approx(ref.estimates[1], rel=REL)
    assert got.params["c2"] == pytest.approx(ref.estimates[2], rel=REL)
    # NIST StRD Pontius: certified standard deviations of B0, B1, B2
    assert got.stderr["c0"] == pytest.approx(ref.std_devs[0], rel=REL)
    assert got.stderr["c1"] == pytest.approx(ref.std_devs[1], rel=REL)
    assert got.stderr["c2"] == pytest.approx(ref.std_devs[2], rel=REL)
    # NIST StRD Pontius: certified residual standard deviation
    assert got.rse == pytest.approx(ref.residual_sd, rel=REL)
    assert got.dof == 37  # NIST StRD Pontius: residual degrees of freedom (ANOVA table)
