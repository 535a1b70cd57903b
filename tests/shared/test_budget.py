"""GUM uncertainty budget of a converted value."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from shared import BadInput, fit
from shared.budget import TypeB, budget, welch_satterthwaite

DATA = json.loads((Path(__file__).parents[1] / "data" / "uncertainty_examples.json").read_text())


def test_welch_satterthwaite_worked_example() -> None:
    # Source: GUM Annex G.4.1 formula; example values in tests/data/uncertainty_examples.json.
    ex = DATA["welch_satterthwaite"]
    nu = [np.inf if n is None else n for n in ex["nu"]]
    nu_eff = welch_satterthwaite(ex["u"], nu)
    assert nu_eff == pytest.approx(ex["nu_eff"], abs=5e-4)
    assert welch_satterthwaite([0.3, 0.4], [np.inf, np.inf]) == np.inf


def test_budget_rows_combine_by_root_sum_of_squares() -> None:
    # ISO/TS 28037 example 5 data (stimulus = value, response = reading), reading noise.
    ex = DATA["iso_ts_28037_example_5"]
    f = fit("line", ex["y_response"], ex["x_reference"], noise="reading")
    inputs = TypeB(reference_expanded=0.02, reference_k=2.0, resolution=0.001, extra_u=0.005)
    b = budget(f, 10.5, inputs, value_unit="mm", reading_unit="V")
    sources = [r.source.split(" (")[0] for r in b.rows]
    assert sources == [
        "calibration curve",
        "repeatability of a new reading",
        "reference standard",
        "reading resolution",
        "stated extra term",
    ]
    # the two type A rows are the ISO/TS 28037 u(x0) split into its parts (published 0.097405)
    type_a = np.sqrt(sum(r.contribution**2 for r in b.rows if r.kind == "A"))
    assert type_a == pytest.approx(ex["inverse_u_x0"], abs=1e-6)
    resolution = b.rows[3]
    assert resolution.distribution == "rectangular"
    assert resolution.u == pytest.approx(0.001 / np.sqrt(12.0), rel=1e-12)  # GUM 4.3.7
    assert resolution.sensitivity == pytest.approx(f.params["c1"], rel=1e-6)
    assert b.rows[2].contribution == pytest.approx(0.01, rel=1e-12)
    expected_u = np.sqrt(
        ex["inverse_u_x0"] ** 2 + 0.01**2 + (0.001 / np.sqrt(12) * f.params["c1"]) ** 2 + 0.005**2
    )
    assert b.u == pytest.approx(expected_u, abs=1e-6)
    assert 4 < b.dof_eff < 6  # dominated by the type A terms with 4 dof
    assert b.expanded == pytest.approx(b.k * b.u)
    assert json.dumps(b.to_dict())


def test_budget_refuses_readings_outside_the_valid_range() -> None:
    f = fit("line", [1.0, 2.0, 3.0, 4.0], [2.0, 4.1, 5.9, 8.0])
    with pytest.raises(BadInput, match="valid range"):
        budget(f, 9.0)
