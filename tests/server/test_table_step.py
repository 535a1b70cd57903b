"""The default step of a conversion table (server.exports.service.default_step): every code for
whole-code readings, else the smallest step of the 1-2-5 series (common practice, no source)
that gives at most 200 rows. Checked as properties over random reading spans."""

from __future__ import annotations

import math
from types import SimpleNamespace

from hypothesis import given
from hypothesis import strategies as st

from server.exports.service import DEFAULT_ROWS, default_step
from shared.exports import MAX_TABLE_ROWS


def one_two_five(step: float) -> bool:
    mantissa = step / 10 ** math.floor(math.log10(step) + 1e-12)
    return any(math.isclose(mantissa, m, rel_tol=1e-9) for m in (1.0, 2.0, 5.0))


def smaller(step: float) -> float:
    """The 1-2-5 step just below ``step``."""
    decade = 10 ** math.floor(math.log10(step) + 1e-12)
    m = round(step / decade)
    return {1: 0.5, 2: 1.0, 5: 2.0}[m] * decade


def type_with(lo: float, hi: float) -> SimpleNamespace:
    return SimpleNamespace(name="t", reading_min=lo, reading_max=hi, reading_unit="mV/V")


@given(
    st.floats(min_value=-1e4, max_value=1e4, allow_nan=False),
    st.floats(min_value=1e-3, max_value=1e5, allow_nan=False),
)
def test_non_code_spans_get_the_smallest_125_step_within_200_rows(lo: float, span: float) -> None:
    hi = lo + span
    if float(lo).is_integer() and float(hi).is_integer():
        return  # whole codes: covered below
    step = default_step(type_with(lo, hi))  # type: ignore[arg-type]
    assert one_two_five(step)
    assert math.floor(span / step + 1e-9) + 1 <= DEFAULT_ROWS + 1
    assert math.floor(span / smaller(step) + 1e-9) + 1 > DEFAULT_ROWS  # no finer step fits


@given(st.integers(-5000, 5000), st.integers(1, MAX_TABLE_ROWS - 1))
def test_whole_code_spans_list_every_code(lo: int, span: int) -> None:
    assert default_step(type_with(float(lo), float(lo + span))) == 1.0  # type: ignore[arg-type]


@given(st.integers(MAX_TABLE_ROWS, 2**32))
def test_very_wide_code_spans_list_every_power_of_two_code_within_the_limit(span: int) -> None:
    step = default_step(type_with(0.0, float(span)))  # type: ignore[arg-type]
    assert step >= 2 and math.log2(step).is_integer()
    assert math.floor(span / step) + 1 <= MAX_TABLE_ROWS  # the table can be made
    assert math.floor(span / (step / 2)) + 1 > MAX_TABLE_ROWS  # and no finer power of two


def test_a_load_cell_span() -> None:
    # 0..2.2 mV/V: 2.2 / 200 = 0.011, so 0.02 (111 rows); 0.01 would give 221
    assert default_step(type_with(0.0, 2.2)) == 0.02  # type: ignore[arg-type]
