"""decide(): pass/fail cases built by hand from the rule in shared/acceptance.py.

Rule: allowed error at a point = tolerance_abs + tolerance_rel/100 * |value|. Pass when every used
point's |residual| <= allowed, the k = 2 expanded uncertainty U at every used point is
<= allowed / TUR (TUR 4 by default), and the fitted curve is monotone over its valid range.
U is the fitted curve's alone unless type B inputs are given (see the section below).

The points: readings r = 0..10, values 1 + 2 r + e with e = d * ((r - 5)^2 - 10), d = 0.01.
e sums to zero and is orthogonal to r (it is the discrete quadratic orthogonal polynomial), so the
least-squares line is exactly 1 + 2 r and the residuals are exactly e:
    e = d * [15, 6, -1, -6, -9, -10, -9, -6, -1, 6, 15], largest |e| = 0.15 at r = 0 and r = 10.
By hand: sum e^2 = 858 d^2, so s = d sqrt(858 / 9); Sxx = sum (r - 5)^2 = 110, so the curve's
standard uncertainty is u(r) = s sqrt(1/11 + (r - 5)^2 / 110), largest at r = 0 and 10:
    U_max = 2 s sqrt(35/110) = 0.110151...   (and U(5) = 2 s sqrt(1/11) = 0.0588...)
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from shared import BadInput, Fit, decide, fit
from shared.budget import TypeB

D = 0.01
R = np.arange(11.0)
E = D * ((R - 5.0) ** 2 - 10.0)
V = 1.0 + 2.0 * R + E
S = D * math.sqrt(858.0 / 9.0)
U_MAX = 2.0 * S * math.sqrt(35.0 / 110.0)  # 0.110151


@pytest.fixture(scope="module")
def line_fit() -> Fit:
    return fit("line", R, V)


def test_hand_numbers_hold(line_fit: Fit) -> None:
    assert line_fit.params["c0"] == pytest.approx(1.0, abs=1e-12)
    assert line_fit.params["c1"] == pytest.approx(2.0, abs=1e-12)
    np.testing.assert_allclose(line_fit.residuals, E, atol=1e-12)
    assert line_fit.rse == pytest.approx(S, rel=1e-12)
    assert abs(U_MAX - 0.110151) < 1e-6


def test_passes_when_errors_and_uncertainty_are_within_tolerance(line_fit: Fit) -> None:
    # allowed 0.5 >= 0.15 everywhere; 0.5 / 0.110151 = 4.54 >= 4
    d = decide(line_fit, 0.5, None)
    assert d.passed and d.reasons == ()
    assert d.worst_error == pytest.approx(0.15, rel=1e-9)
    assert d.allowed_at_worst == 0.5
    assert d.max_expanded_uncertainty == pytest.approx(U_MAX, rel=1e-9)
    assert d.tur_achieved == pytest.approx(0.5 / U_MAX, rel=1e-9)
    assert d.tur_required == 4.0
    assert "0.5" in d.rule and "4:1" in d.rule


def test_fails_on_uncertainty_ratio_alone(line_fit: Fit) -> None:
    # every error (<= 0.15) is within 0.4, but 0.4 / 0.110151 = 3.63 < 4
    d = decide(line_fit, 0.4, None)
    assert not d.passed
    assert len(d.reasons) == 1 and "test-uncertainty ratio" in d.reasons[0]
    assert d.tur_achieved == pytest.approx(0.4 / U_MAX, rel=1e-9)


def test_a_lower_required_ratio_passes_the_same_fit(line_fit: Fit) -> None:
    # 3.63 >= 3
    assert decide(line_fit, 0.4, None, tur=3.0).passed


def test_fails_on_errors_alone(line_fit: Fit) -> None:
    # with TUR 1: 0.12 / 0.110151 = 1.09 >= 1, but |e| = 0.15 > 0.12 at r = 0 and r = 10 (two
    # points; the next largest |e| is 0.10)
    d = decide(line_fit, 0.12, None, tur=1.0)
    assert not d.passed
    assert len(d.reasons) == 1 and d.reasons[0].startswith("2 point(s) outside tolerance")
    assert d.worst_error == pytest.approx(0.15, rel=1e-9)
    assert d.worst_error_at in (pytest.approx(V[0]), pytest.approx(V[10]))


def test_relative_tolerance_uses_the_value(line_fit: Fit) -> None:
    # 10 % of |value|: at r = 0 the value is 1.15, allowed 0.115 < 0.15 (outside); at r = 1 the
    # value is 3.06, allowed 0.306 > 0.06; elsewhere larger still. One point outside, and the
    # ratio at r = 0 is 0.115 / 0.110151 = 1.04 < 4.
    d = decide(line_fit, None, 10.0)
    assert not d.passed
    assert d.reasons[0].startswith("1 point(s) outside tolerance")
    assert "test-uncertainty ratio" in d.reasons[1]
    assert d.worst_error_at == pytest.approx(1.15, rel=1e-12)
    assert d.allowed_at_worst == pytest.approx(0.115, rel=1e-12)


def test_absolute_and_relative_parts_add(line_fit: Fit) -> None:
    # 0.42 alone: 0.42 / 0.110151 = 3.81 < 4, fails. 0.42 + 2 % of |value|: at r = 0,
    # 0.42 + 0.023 = 0.443 -> 4.02; at r = 10, 0.42 + 0.423 -> 7.65; in between U is smaller and
    # the allowed error larger. Passes.
    assert not decide(line_fit, 0.42, None).passed
    d = decide(line_fit, 0.42, 2.0)
    assert d.passed, d.reasons
    assert d.tur_achieved == pytest.approx(0.443 / U_MAX, rel=1e-9)


def test_excluded_points_do_not_count() -> None:
    # a twelfth point 5 units off, excluded by the user: the fit and the decision are as before
    r, v = np.r_[R, 5.5], np.r_[V, 1.0 + 2.0 * 5.5 + 5.0]
    f = fit("line", r, v, exclude={11: "operator: probe not seated"})
    d = decide(f, 0.5, None)
    assert d.passed and d.worst_error == pytest.approx(0.15, rel=1e-9)


def test_an_exact_line_passes_any_tolerance() -> None:
    f = fit("line", R, 1.0 + 2.0 * R)
    assert decide(f, 1e-6, None).passed


@pytest.mark.parametrize(
    ("tolerance_abs", "tolerance_rel"), [(None, None), (0.0, None), (None, 0.0), (0.0, 0.0)]
)
def test_a_missing_tolerance_is_bad_input(
    line_fit: Fit, tolerance_abs: float | None, tolerance_rel: float | None
) -> None:
    with pytest.raises(BadInput, match="tolerance"):
        decide(line_fit, tolerance_abs, tolerance_rel)


@pytest.mark.parametrize(
    ("tolerance_abs", "tolerance_rel", "tur"),
    [(-0.1, None, 4.0), (0.5, -1.0, 4.0), (0.5, None, 0.0)],
)
def test_negative_tolerance_or_ratio_is_bad_input(
    line_fit: Fit, tolerance_abs: float, tolerance_rel: float | None, tur: float
) -> None:
    with pytest.raises(BadInput):
        decide(line_fit, tolerance_abs, tolerance_rel, tur=tur)


# ---- type B inputs in the TUR, and monotonicity -------------------------------------------------
# Rule: U = 2 sqrt(u_curve^2 + u_ref^2 + u_res^2) at each used point, u_ref = U_ref / k_ref,
# u_res = step / sqrt(12) * |slope|. For the line above the slope is exactly 2 everywhere and
# u_curve is largest at r = 0 and r = 10, u_curve^2 = (U_MAX / 2)^2 = S^2 * 35/110 = 0.0030333.
U_CURVE_END_SQ = (U_MAX / 2.0) ** 2


def test_the_reference_standard_enters_the_tur(line_fit: Fit) -> None:
    # U_ref = 0.1 at k = 2: u_ref = 0.05. At the ends U = 2 sqrt(0.0030333 + 0.0025) = 0.148773;
    # 0.5 / 0.148773 = 3.36 < 4: the fit that passed alone now fails on the ratio alone.
    big_u = 2.0 * math.sqrt(U_CURVE_END_SQ + 0.05**2)
    assert abs(big_u - 0.148773) < 1e-6
    d = decide(line_fit, 0.5, None, type_b=TypeB(reference_expanded=0.1, reference_k=2.0))
    assert not d.passed
    assert len(d.reasons) == 1 and "test-uncertainty ratio 3.36:1" in d.reasons[0]
    assert d.max_expanded_uncertainty == pytest.approx(big_u, rel=1e-9)
    assert d.tur_achieved == pytest.approx(0.5 / big_u, rel=1e-9)
    assert "reference standard (U = 0.1, k = 2)" in d.rule
    # 0.6 / 0.148773 = 4.03 >= 4: passes
    assert decide(line_fit, 0.6, None, type_b=TypeB(reference_expanded=0.1)).passed
    # the same U stated at k = 1 is u_ref = 0.1: U = 2 sqrt(0.0030333 + 0.01) = 0.228327
    d = decide(line_fit, 0.6, None, type_b=TypeB(reference_expanded=0.1, reference_k=1.0))
    assert d.max_expanded_uncertainty == pytest.approx(2 * math.sqrt(U_CURVE_END_SQ + 0.01))
    assert abs(d.max_expanded_uncertainty - 0.228327) < 1e-6


def test_the_reading_resolution_enters_the_tur(line_fit: Fit) -> None:
    # one step of 0.1: u_res = 0.1 / sqrt(12) * 2 = 0.0577350; at the ends
    # U = 2 sqrt(0.0030333 + 0.0033333) = 0.159583, and with u_ref = 0.05 as well
    # U = 2 sqrt(0.0030333 + 0.0025 + 0.0033333) = 0.188326.
    resolution_only = 2.0 * math.sqrt(U_CURVE_END_SQ + (0.1 / math.sqrt(12.0) * 2.0) ** 2)
    assert abs(resolution_only - 0.159583) < 1e-6
    d = decide(line_fit, 0.7, None, type_b=TypeB(resolution=0.1), reading_unit="counts")
    assert d.max_expanded_uncertainty == pytest.approx(resolution_only, rel=1e-9)
    assert d.passed  # 0.7 / 0.159583 = 4.39
    assert "reading resolution (one step = 0.1 counts, rectangular)" in d.rule
    both = TypeB(reference_expanded=0.1, reference_k=2.0, resolution=0.1)
    d = decide(line_fit, 0.7, None, type_b=both)
    assert abs(d.max_expanded_uncertainty - 0.188326) < 1e-6
    assert not d.passed and "3.72:1" in d.reasons[0]  # 0.7 / 0.188326 = 3.717


def test_a_stated_extra_term_is_not_part_of_the_tur(line_fit: Fit) -> None:
    # the rule counts the curve, the reference standard and the resolution only
    d = decide(line_fit, 0.5, None, type_b=TypeB(extra_u=10.0))
    assert d.passed and d.max_expanded_uncertainty == pytest.approx(U_MAX, rel=1e-9)


def test_a_curve_that_is_not_monotone_fails_with_the_reason() -> None:
    # v = (r - 5)^2 on r = 0..10: a parabola through every point exactly (residuals and
    # uncertainty zero), turning at r = 5 inside the valid range 0..10.
    f = fit("polynomial", R, (R - 5.0) ** 2, degree=2)
    assert not f.monotone
    d = decide(f, 0.5, None)
    assert not d.passed
    assert len(d.reasons) == 1
    assert d.reasons[0].startswith("the fitted curve is not monotone over its valid range")
    assert "readings 0 to 10" in d.reasons[0]
    assert "monotone" in d.rule


@pytest.mark.parametrize(
    "inputs",
    [TypeB(reference_expanded=-0.1), TypeB(reference_expanded=0.1, reference_k=0.0),
     TypeB(resolution=-1.0)],
)  # fmt: skip
def test_negative_type_b_inputs_are_bad_input(line_fit: Fit, inputs: TypeB) -> None:
    with pytest.raises(BadInput):
        decide(line_fit, 0.5, None, type_b=inputs)


def test_closest_to_its_limit_is_the_largest_share_of_tolerance() -> None:
    """By hand: the line through (0, 0), (1000, 1000) is value = reading; residuals are put at
    80 (0.013) and 800 (2.4), with the rest exact and a matching pair on the other side so that
    the least-squares line stays value = reading. Tolerance 4 + 0.75 % of value: 4.6 allowed at
    80 (0.28 % used), 10 at 800 (24 % used): the point at 800 is closest to its limit, though
    its margin (allowed - |error|: 7.6) is larger than at 80 (4.587)."""
    r = np.array([80.0, 80.0, 800.0, 800.0, 400.0])
    v = np.array([80.013, 79.987, 802.4, 797.6, 400.0])
    f = fit("line", r, v)
    assert f.params["c1"] == pytest.approx(1.0, rel=1e-12)
    d = decide(f, 4.0, 0.75, tur=1e-9)
    assert d.worst_error == pytest.approx(2.4, rel=1e-9)
    assert d.worst_error_at in (802.4, 797.6)
    assert d.tolerance_used_pct == pytest.approx(100 * 2.4 / d.allowed_at_worst, rel=1e-12)
    assert 23.9 < d.tolerance_used_pct < 24.1
    assert d.to_dict()["tolerance_used_pct"] == d.tolerance_used_pct
