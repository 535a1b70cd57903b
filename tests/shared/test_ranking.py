"""Model ranking by AICc (tests/data/model_selection.json names the source of the values)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from shared.ranking import information_criteria, rank
from tests.shared.synthetic import DISTANCES_MM, peaked_counts, rangefinder_counts

REF = json.loads((Path(__file__).parents[1] / "data" / "model_selection.json").read_text())


@pytest.mark.parametrize("model", ["line", "quadratic"])
def test_information_criteria_match_the_worked_example(model: str) -> None:
    ex = REF[model]
    aic, aicc, bic = information_criteria(ex["rss"], len(REF["x"]), ex["p"])
    assert (aic, aicc, bic) == pytest.approx((ex["aic"], ex["aicc"], ex["bic"]), abs=1e-6)


def test_aicc_prefers_the_line_at_small_n_as_the_example_shows() -> None:
    ranking = rank([("polynomial", {"degree": 2}), ("line", {})], REF["x"], REF["y"])
    by_family = {c.family: c for c in ranking.candidates}
    assert by_family["line"].rss == pytest.approx(REF["line"]["rss"], rel=1e-8)
    assert by_family["polynomial"].aicc == pytest.approx(REF["quadratic"]["aicc"], abs=1e-6)
    assert ranking.candidates[0].family == "line"
    assert ranking.recommended is not None and ranking.recommended.family == "line"
    assert "fewest parameters" in ranking.reason


def test_rangefinder_ranking_rejects_the_line_and_shares_fold_back_exclusions() -> None:
    rng = np.random.default_rng(4)
    distances = np.r_[20.0, 30.0, DISTANCES_MM]
    counts = np.r_[peaked_counts(np.array([20.0, 30.0])), rangefinder_counts(DISTANCES_MM)]
    counts = counts + rng.normal(0.0, 1.0, counts.size)
    ranking = rank(
        [("line", {}), ("inverse_offset", {}), ("power", {}), ("inverse", {})], counts, distances
    )
    assert set(ranking.excluded) == {0, 1}
    for c in ranking.candidates:
        if c.fit is not None:
            assert not c.fit.used[0] and not c.fit.used[1]
    assert ranking.recommended is not None
    assert ranking.recommended.family == "inverse_offset"
    line = next(c for c in ranking.candidates if c.family == "line")
    assert line.delta_aicc > 50
    assert json.dumps(ranking.to_dict())  # plain JSON


def test_failed_candidates_are_listed_last_with_their_error() -> None:
    ranking = rank(
        [("line", {}), ("power", {})], [-2.0, -1.0, 1.0, 2.0, 3.0], [1.0, 2.0, 3.0, 4.0, 5.0]
    )
    assert ranking.candidates[-1].family == "power"
    assert ranking.candidates[-1].error
    assert ranking.recommended is not None and ranking.recommended.family == "line"
