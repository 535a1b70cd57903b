"""rank_many and fit_each: the results of rank and fit one by one, batched by family.

Synthetic points (common practice, no source): an invented potentiometer read in counts (a line
with a slight bow), an invented rangefinder whose far end folds back, and datasets that some
families cannot fit.
"""

from __future__ import annotations

import numpy as np
import pytest

from shared import CalibrationError, fit
from shared.batch import fit_each
from shared.ranking import rank, rank_many

R = np.linspace(100.0, 3900.0, 15)


def datasets() -> list[tuple[list[float], list[float]]]:
    rng = np.random.default_rng(7)
    out = [
        (
            list(R + rng.normal(0, 2, R.size)),
            list(0.5 + 0.0244 * R + 3e-7 * R**2 + rng.normal(0, 0.05, R.size)),
        )
        for _ in range(40)
    ]
    distance = np.linspace(60.0, 800.0, 15)
    counts = 50000.0 / (distance + 20.0)
    counts[:2] = counts[2] - np.array([300.0, 150.0])  # too close: the readings turn over
    out.append((list(counts), list(distance)))
    out.append(([1.0, 2.0], [3.0, 4.0]))  # too few points for most families
    out.append(([5.0, 5.0, 5.0, 5.0], [1.0, 2.0, 3.0, 4.0]))  # one reading: nothing fits
    return out


def same(a: object, b: object, rel: float) -> bool:
    """Equal, numbers within ``rel`` (relative; 0: exactly), through dicts and lists."""
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k], rel) for k in a)
    if isinstance(a, list | tuple) and isinstance(b, list | tuple):
        return len(a) == len(b) and all(same(x, y, rel) for x, y in zip(a, b, strict=True))
    if isinstance(a, float) and isinstance(b, float) and rel:
        return a == pytest.approx(b, rel=rel, abs=1e-12)
    return a == b


# value noise: fit_many runs fit()'s own solvers, bit for bit; reading noise: the batched
# effective-variance fit agrees with fit() to ~1e-12 (tests/shared/test_batch_masked_reading.py);
# 1e-7 relative here covers the derived figures (AICc of near-exact fits, covariances)
@pytest.mark.parametrize(("noise", "rel"), [("value", 0.0), ("reading", 1e-7)])
def test_rank_many_is_rank_one_by_one(noise: str, rel: float) -> None:
    candidates = [
        ("line", {}),
        ("polynomial", {"degree": 2}),
        ("inverse_offset", {}),
        ("inverse", {}),
    ]
    data = datasets()
    many = rank_many(candidates, data, noise=noise)
    assert len(many) == len(data)
    for got, (r, v) in zip(many, data, strict=True):
        want = rank(candidates, r, v, noise=noise)
        assert same(got.to_dict(), want.to_dict(), rel)
        assert dict(got.excluded) == dict(want.excluded)
        if want.recommended is not None:
            assert got.recommended is not None
            assert same(got.recommended.fit.to_dict(), want.recommended.fit.to_dict(), rel)
    assert any(m.excluded for m in many)  # the fold-back case
    assert all(c.fit is None for c in many[-1].candidates)


def test_fit_each_gives_errors_in_place() -> None:
    data = datasets()
    found = fit_each("line", data)
    for got, (r, v) in zip(found, data, strict=True):
        try:
            want = fit("line", r, v)
        except CalibrationError as exc:
            assert isinstance(got, type(exc)) and str(got) == str(exc)
        else:
            assert not isinstance(got, CalibrationError)
            assert got.to_dict() == want.to_dict()
    assert isinstance(found[-1], CalibrationError)
