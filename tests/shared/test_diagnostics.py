"""Suspect points and the lack-of-fit test, against statsmodels (reference library)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.anova import anova_lm
from statsmodels.stats.outliers_influence import OLSInfluence

from shared import fit
from shared.diagnostics import lack_of_fit, leverage, studentized_residuals, suspect_points


def _line_data(seed: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    r = np.linspace(100.0, 4000.0, 14)
    return r, -7.0 + 0.0733 * r + rng.normal(0.0, 0.05, r.size)


def test_studentized_residuals_and_leverage_equal_statsmodels() -> None:
    r, v = _line_data()
    v[6] += 0.4  # one point off
    f = fit("line", r, v)
    influence = OLSInfluence(sm.OLS(v, sm.add_constant(r)).fit())
    # reference: statsmodels OLSInfluence (externally studentised residuals, hat diagonal)
    np.testing.assert_allclose(
        studentized_residuals(f), influence.resid_studentized_external, rtol=1e-9
    )
    np.testing.assert_allclose(leverage(f), influence.hat_matrix_diag, rtol=1e-9)


def test_one_bad_point_is_flagged_with_its_reason_and_kept() -> None:
    r, v = _line_data()
    v[6] += 0.5  # ten noise standard deviations
    f = fit("line", r, v)
    found = suspect_points(f)
    assert [s.index for s in found] == [6]
    assert "Bonferroni" in found[0].reason
    assert f.used[6]  # flagged, not dropped


def test_clean_calibrations_rarely_raise_suspects() -> None:
    # Claim: the Bonferroni limit keeps the per-calibration false-alarm rate near alpha = 5 %.
    # 400 clean simulated calibrations, fixed seed; tolerance: rate below 9 % (alpha plus about
    # 3 binomial sd of 1.1 %).
    rng = np.random.default_rng(11)
    r = np.linspace(0.0, 10.0, 12)
    alarms = sum(
        bool(suspect_points(fit("line", r, 1.0 + 2.0 * r + rng.normal(0, 0.1, 12))))
        for _ in range(400)
    )
    assert alarms / 400 < 0.09


def test_lack_of_fit_f_equals_statsmodels_anova() -> None:
    # Five reference levels, three repeats each, a response with slight curvature and noise in
    # the reading; our reading-noise line fit is the reading-on-value regression, whose lack of
    # fit statsmodels tests by comparing it with the saturated one-way model.
    rng = np.random.default_rng(7)
    levels = np.repeat([10.0, 20.0, 30.0, 40.0, 50.0], 3)
    reading = 100.0 + 8.0 * levels + 0.01 * levels**2 + rng.normal(0.0, 1.5, levels.size)
    f = fit("line", reading, levels, noise="reading")
    result = lack_of_fit(f)
    assert result is not None
    reduced = sm.OLS(reading, sm.add_constant(levels)).fit()
    groups = (levels[:, None] == np.unique(levels)[None, :]).astype(float)
    full = sm.OLS(reading, groups).fit()
    table = anova_lm(reduced, full)
    # reference: statsmodels anova_lm, F and p of the lack-of-fit comparison
    assert result.f == pytest.approx(table["F"].iloc[1], rel=1e-6)
    assert result.p_value == pytest.approx(table["Pr(>F)"].iloc[1], rel=1e-5)
    assert (result.dof_lack_of_fit, result.dof_pure_error) == (3, 10)
    assert result.repeatability_fit_space == pytest.approx(np.sqrt(full.scale), rel=1e-6)


def test_no_repeats_no_lack_of_fit_test() -> None:
    r, v = _line_data()
    assert lack_of_fit(fit("line", r, v)) is None


def test_points_on_an_exact_line_have_no_suspect() -> None:
    # common practice, no source: rounding-level residuals (~1e-14) are no scatter; studentised
    # they are arbitrary numbers that the Bonferroni limit would wrongly flag
    r = np.linspace(0.0, 1000.0, 12)
    exact = fit("line", r, 0.27 * r - 3.0)
    assert float(np.max(np.abs(exact.residuals))) < 1e-9
    assert suspect_points(exact) == []
    bumped_values = 0.27 * r - 3.0 + np.random.default_rng(3).normal(0.0, 0.01, r.size)
    bumped_values[5] += 0.5
    assert [s.index for s in suspect_points(fit("line", r, bumped_values))] == [5]
