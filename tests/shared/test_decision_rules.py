"""Decision rules (shared.acceptance): simple and guarded acceptance, guard bands and the specific
risk of a false accept, against published worked figures and by hand.

Sources, named beside each check:
* ILAC-G8:2019 (Guidelines on decision rules and statements of conformity), 4.2.2: guarded
  acceptance with w = U (k = 2): a result at the acceptance limit carries a specific false
  accept risk of at most 2.5 % (normal distribution: 1 - Phi(2) = 2.28 %). From memory; not in
  /work/shared/reference/CHECK_VALUES.md.
* ILAC-G8:2019, 4.2.1, simple acceptance: a result at the tolerance limit carries up to 50 %
  risk. From memory.
* JCGM 106:2012 (Evaluation of measurement data - the role of measurement uncertainty in
  conformity assessment), 8.3: a guard band w = U = 2u gives a conformance probability of at
  least 97.7 % at the acceptance limit (normal PDF). From memory.
* The normal quantiles themselves from scipy.stats.norm (reference library).
The hand-built line is tests/shared/test_acceptance.py's (residuals 0.01 ((r - 5)^2 - 10),
U = 0.110151 at r = 0 and r = 10).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from shared import BadInput, decide, fit
from shared.acceptance import specific_false_accept
from tests.shared.test_acceptance import U_MAX, R, V


def test_guarded_w_equal_u_at_the_acceptance_limit_ilac_g8() -> None:
    """ILAC-G8:2019 4.2.2 (from memory): w = U, k = 2: at most 2.5 % specific false accept."""
    tolerance, big_u = 1.0, 0.2
    at_limit = tolerance - big_u
    risk = float(
        specific_false_accept(np.array([at_limit]), np.array([tolerance]), np.array([big_u / 2]))[0]
    )
    assert risk == pytest.approx(norm.sf(2.0) + norm.cdf(-18.0), rel=1e-12)
    assert risk == pytest.approx(0.02275, abs=5e-6)
    assert risk <= 0.025


def test_conformance_probability_at_the_guarded_limit_jcgm_106() -> None:
    """JCGM 106:2012 8.3 (from memory): w = U = 2u: conformance probability >= 97.7 %."""
    risk = float(specific_false_accept(np.array([-0.8]), np.array([1.0]), np.array([0.1]))[0])
    assert 1.0 - risk == pytest.approx(0.97725, abs=5e-6)


def test_simple_acceptance_at_the_tolerance_limit_is_half() -> None:
    """ILAC-G8:2019 4.2.1 (from memory): a result at the limit, simple acceptance: 50 %."""
    risk = specific_false_accept(np.array([1.0, -1.0]), np.array([1.0, 1.0]), np.array([0.1, 0.1]))
    assert risk == pytest.approx([0.5, 0.5], abs=1e-12)


def test_guard_multiple_for_a_one_percent_risk() -> None:
    """scipy.stats.norm (reference library): w = z_0.99 u = 1.1632 U gives 1 % at the limit."""
    r = norm.isf(0.01) / 2.0
    assert r == pytest.approx(1.1632, abs=1e-4)
    risk = specific_false_accept(np.array([1.0 - r * 0.2]), np.array([1.0]), np.array([0.1]))
    assert risk[0] == pytest.approx(0.01, rel=1e-9)


def test_no_uncertainty_means_no_risk_inside_and_certainty_outside() -> None:
    got = specific_false_accept(np.array([0.5, 1.5]), np.array([1.0, 1.0]), np.zeros(2))
    assert got.tolist() == [0.0, 1.0]


# -- decide() with a rule, on the hand-built line --------------------------------------------------
@pytest.fixture(scope="module")
def line():
    return fit("line", R, V)


def test_simple_rule_fails_on_the_tur_where_guarded_passes(line) -> None:
    # tolerance 0.3: errors 0.15 at most; TUR 0.3 / 0.110151 = 2.72 < 4
    simple = decide(line, 0.3, None)
    assert not simple.passed and "test-uncertainty ratio" in simple.reasons[0]
    assert simple.decision_rule == "simple" and simple.guard_multiple is None
    assert simple.rule.startswith("Simple acceptance (ILAC-G8:2019)")
    # guarded, w = U: acceptance limit at r = 0 is 0.3 - 0.110151 = 0.189849 >= 0.15: pass
    guarded = decide(line, 0.3, None, rule_kind="guarded")
    assert guarded.passed, guarded.reasons
    assert guarded.decision_rule == "guarded" and guarded.guard_multiple == 1.0
    assert guarded.rule.startswith("Guarded acceptance (ILAC-G8:2019)")
    assert "w = 1 U" in guarded.rule
    assert guarded.worst_error_at == pytest.approx(V[0])  # first of the two 50 % points
    assert guarded.guard_band_at_worst == pytest.approx(U_MAX, rel=1e-9)
    assert guarded.acceptance_limit_at_worst == pytest.approx(0.3 - U_MAX, rel=1e-9)
    # the specific risk, by hand at r = 0 and r = 10 (e = +0.15, u = U / 2), the largest
    u = U_MAX / 2.0
    by_hand = norm.sf((0.3 - 0.15) / u) + norm.cdf((-0.3 - 0.15) / u)
    assert guarded.false_accept_risk == pytest.approx(by_hand, rel=1e-9)
    assert guarded.false_accept_at in (pytest.approx(V[0]), pytest.approx(V[10]))
    assert math.isclose(by_hand, 0.00323, rel_tol=0.01)


def test_a_wider_guard_band_fails(line) -> None:
    # w = 1.5 U = 0.165227 at r = 0: the limit 0.134773 < 0.15
    d = decide(line, 0.3, None, rule_kind="guarded", guard_multiple=1.5)
    assert not d.passed
    assert d.reasons[0].startswith("2 point(s) outside the acceptance limit")
    assert d.false_accept_risk is None  # only stated for a unit that passes
    assert d.acceptance_limit_at_worst == pytest.approx(0.3 - 1.5 * U_MAX, rel=1e-9)


def test_bad_rule_settings_are_bad_input(line) -> None:
    with pytest.raises(BadInput, match="decision rule"):
        decide(line, 0.3, None, rule_kind="lenient")  # type: ignore[arg-type]
    with pytest.raises(BadInput, match="guard band multiple"):
        decide(line, 0.3, None, rule_kind="guarded", guard_multiple=-1.0)
