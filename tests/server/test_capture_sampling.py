"""The arithmetic of `sensorledger capture` (server/cli/sampling.py): readings from lines, spike
rejection by median and MAD, steady windows, point statistics, plans and the CSV it writes.
Expected values are worked by hand beside each test; the statistical claims are checked by
simulation with a fixed seed and a stated tolerance."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from server.calibrations.csvfile import parse_points_csv
from server.cli.sampling import (
    MAD_TO_SD,
    Collector,
    PointStats,
    Settings,
    compile_pattern,
    confirmation,
    csv_rows,
    notes_of,
    parse_plan,
    reading_of,
    split_outliers,
)


@pytest.mark.parametrize(
    ("line", "expected"),
    [
        ("adc: 2048", 2048.0),
        ("t=120 v=1.5e2", 150.0),  # the last number on the line
        ("-3.25", -3.25),
        ("value .5", 0.5),
        ("ERR timeout", None),
        ("adc: ", None),
        ("", None),
    ],
)
def test_default_reading_is_the_last_number(line: str, expected: float | None) -> None:
    assert reading_of(line) == expected


def test_pattern_takes_its_first_group_else_its_match() -> None:
    group = compile_pattern(r"raw=(\d+)")
    assert reading_of("t=17 raw=2051 mv=1652", group) == 2051.0
    assert reading_of("t=17 mv=1652", group) is None
    whole = compile_pattern(r"\d+\.\d+")
    assert reading_of("n=3 v=1.25 ok", whole) == 1.25
    with pytest.raises(ValueError, match="not a regular expression"):
        compile_pattern("raw=(")


def test_spike_is_rejected_by_median_and_mad() -> None:
    # by hand: median 100; |deviations| 0,1,1,0,2,2,0,400 -> MAD 1 -> robust SD 1.4826;
    # limit 3.5 x 1.4826 = 5.19, so 500 goes and the rest stay
    values = [100, 101, 99, 100, 102, 98, 100, 500]
    kept, rejected = split_outliers(values, 3.5, 0.0)
    assert rejected == [500]
    assert kept == [100, 101, 99, 100, 102, 98, 100]
    assert pytest.approx(1 / 0.6744897501960817, rel=1e-12) == MAD_TO_SD  # 1/Phi^-1(0.75)


def test_spread_floor_keeps_a_quantised_reading() -> None:
    # seven equal counts and one a count off: MAD 0; without a floor the 101 is "a spike"
    values = [100.0] * 7 + [101.0]
    assert split_outliers(values, 3.5, 0.0)[1] == [101.0]
    assert split_outliers(values, 3.5, 0.5)[1] == []


def test_fixed_count_point_statistics() -> None:
    c = Collector(150.0, Settings(count=7))
    for line in ["adc: 100", "junk", "adc: 101", "adc: 99", "adc: 100", "adc: 102", "??"]:
        assert c.add_line(line) is None
    assert c.add_line("adc: 98") is None
    got = c.add_line("adc: 500")  # the seventh sample
    assert got == PointStats(
        reference_value=150.0,
        reading=100.0,  # 600 / 6: the spike left out
        sd=math.sqrt(10 / 5),  # deviations 0,1,1,0,2,2 -> sum of squares 10 over n - 1 = 5
        n=6,
        rejected=1,
        garbage=2,
    )
    assert c.add_line("adc: 7") == got  # a finished point takes nothing more


def test_threshold_waits_for_a_steady_window() -> None:
    s = Settings(window=5, threshold=1.0)
    c = Collector(10.0, s)
    moving = [50, 60, 70, 80, 90]  # the target still settling: SD 15.8
    for x in moving:
        assert c.add(x) is None
    steady = [100, 100.5, 99.5, 100, 100]
    found, taken = None, 0
    while found is None and taken < len(steady):
        found = c.add(steady[taken])
        taken += 1
    # by hand: after the third steady sample the window is 80, 90, 100, 100.5, 99.5: median
    # 99.5, MAD 1 (deviations 19.5, 9.5, 0.5, 1, 0), limit 5.19, so 80 and 90 are left out
    # and the three kept (SD 0.5) are steady
    assert found is not None and found.steady and taken == 3
    assert (found.reading, found.n, found.rejected) == (100.0, 3, 2)
    assert found.sd == pytest.approx(0.5)


def test_a_point_that_never_settles_is_marked() -> None:
    c = Collector(10.0, Settings(window=4, threshold=0.1, max_samples=12, spread_floor=0))
    found = None
    for i in range(12):
        found = c.add(float(i % 2) * 10.0)
    assert found is not None and not found.steady


@pytest.mark.parametrize(
    ("settings", "message"),
    [
        ({"window": 2}, "--window"),
        ({"count": 1}, "--count"),
        ({"threshold": 0.0}, "--threshold"),
        ({"reject_k": 0.0}, "--reject"),
        ({"window": 50, "max_samples": 10}, "--max-samples"),
    ],
)
def test_bad_settings_are_named(settings: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        Settings(**settings)  # type: ignore[arg-type]


def test_plan_and_confirmation() -> None:
    assert parse_plan("100, 150,150;200") == [100.0, 150.0, 150.0, 200.0]
    for bad, message in [("100", "at least two"), ("100,abc", "'abc'"), ("1,inf", "finite")]:
        with pytest.raises(ValueError, match=message):
            parse_plan(bad)
    assert confirmation("", 150.0) == 150.0
    assert confirmation("  152.5 \n", 150.0) == 152.5
    with pytest.raises(ValueError, match="press Enter alone for 150"):
        confirmation("next", 150.0)


def test_csv_is_read_by_the_import_format_exactly() -> None:
    points = [
        PointStats(100.0, 2047.123456789012, 3.1, 29, 1, 4),
        PointStats(150.0, 1500.1 / 3, 2.9, 30, 0, 3),
    ]
    rows = csv_rows(points)
    assert rows[0] == "reference_value,reading,sd,n,rejected"
    read = parse_points_csv(("\n".join(rows) + "\n").encode())
    assert [(p.reference_value, p.reading, p.sd, p.n, p.rejected) for p in read] == [
        (p.reference_value, p.reading, p.sd, p.n, p.rejected) for p in points
    ]
    # the statistics are optional per row (a point typed by hand has none)
    mixed = parse_points_csv(b"reference_value,reading,sd,n,rejected\n1,2,,,\n3,4,0.5,10,1\n")
    assert [(p.sd, p.n, p.rejected) for p in mixed] == [(None, None, None), (0.5, 10, 1)]


def test_notes_carry_the_repeat_statistics_within_the_limit() -> None:
    points = [PointStats(float(v), 10.0 * v, 1.5, 20, 1, 2) for v in range(300)]
    text = notes_of(points, 600)
    assert len(text) <= 2000
    assert "600 line(s) without a reading" in text
    assert " 0: 0 (1.5, 20, 1);" in text and text.endswith(" ...")


def test_means_cover_the_truth_by_simulation(figures) -> None:
    """Points from Gaussian noise (sd 3 counts, whole counts) with 1 sample in 20 a spike of
    +/- 300..900 counts: the mean of the kept samples lies within t(0.975, n - 1) standard
    errors of the truth in about 95 % of points. Tolerance 92 % to 97 % over 2,000 points,
    seed 7 (common practice, no source): the MAD of 30 samples is itself uncertain, so now and
    then a genuine tail sample is trimmed and the SD comes out a little small (93.4 % measured).
    The kept SD estimates the noise (within 5 % on average) and every spike is rejected."""
    rng = np.random.default_rng(7)
    sigma, truth, trials, covered, spikes_missed = 3.0, 2000.3, 2000, 0, 0
    ratios = []
    for _ in range(trials):
        c = Collector(100.0, Settings(count=30))
        found = None
        spikes = 0
        for _ in range(30):
            if rng.random() < 0.05:
                spikes += 1
                x = truth + rng.choice([-1, 1]) * rng.uniform(300, 900)
            else:
                x = truth + rng.normal(0, sigma)
            found = c.add(float(np.round(x)))
        assert found is not None
        spikes_missed += max(0, spikes - found.rejected)
        se = found.sd / math.sqrt(found.n)
        covered += abs(found.reading - truth) <= stats.t.ppf(0.975, found.n - 1) * se
        ratios.append(found.sd / math.sqrt(sigma**2 + 1 / 12))
    coverage = covered / trials
    figures(f"capture point means: {coverage:.1%} within t SE of the truth (2,000 points)")
    assert 0.92 <= coverage <= 0.97
    assert spikes_missed == 0
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.05)
