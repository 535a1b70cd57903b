"""How numbers read on the pages (server.formatting); the rounding is common practice, no source."""

from __future__ import annotations

import math

import pytest

from server.formatting import risk_pct


@pytest.mark.parametrize(
    ("probability", "shown"),
    [
        (0.025, "2.5 %"),  # a guard band of U at the limit: 2.5 % one-sided (normal tail)
        (0.5, "50 %"),
        (2e-6, "0.0002 %"),
        (1.1e-75, "< 0.0001 %"),  # a far normal tail: below the floor, not "1.1e-73 %"
        (0.0, "< 0.0001 %"),
        (None, "—"),
        (math.nan, "—"),
    ],
)
def test_a_risk_reads_as_a_percentage(probability: float | None, shown: str) -> None:
    assert risk_pct(probability) == shown
