"""The fleet card of a sensor type's page: every unit's curve overlaid (flagged outliers named
and coloured, the fleet median dashed), the spread of the most used family's constants with the
median and ±3 MADe, and the table of open fleet_outlier flags.

The seed has few units, so a fleet of an invented line-type potentiometer is built through the
services: 12 units with slopes near 0.27 deg/count, one odd unit at 0.35 deg/count, two units
fitted with a quadratic, one calibrated unit then retired and one never calibrated. Expected
values are computed here from the stored fits (numpy, scipy), never taken from the charts code.
"""

from __future__ import annotations

import base64
import json
import re
from datetime import UTC, datetime, timedelta
from html import unescape
from pathlib import Path
from typing import Any
from urllib.parse import quote

import numpy as np
import pytest
import sqlalchemy as sa
from scipy import stats
from sqlalchemy.orm import Session, selectinload

import shared
from server.calibrations import refits
from server.calibrations.models import CalibrationSession, SessionKind
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.calibrations.service import run_calibration
from server.db import make_engine, make_sessionmaker
from server.flags.models import Flag, FlagKind, Severity
from server.flags.service import recompute_all
from server.fleet import charts
from server.fleet import service as fleet
from server.fleet.models import NoiseIn, SensorType, Unit, UnitStatus
from server.fleet.schemas import SensorTypeCreate, UnitCreate
from tests.web.seed import IR_TYPE, POT_TYPE, TECHNICIAN, seed

LINE_POT = "Line pot 300 deg"
ODD = "LP-0013"
RETIRED = "LP-0014"
UNCALIBRATED = "LP-0017"
QUADRATIC = ("LP-0015", "LP-0016")
SLOPE = 0.27  # deg/count, invented
ODD_SLOPE = 0.35
ISO_MAD_FACTOR = 1.483  # ISO 13528 MADe = 1.483 MAD (the rounded factor the flags use)


def _points_line(rng: np.random.Generator, c0: float, c1: float) -> list[tuple[float, float]]:
    """(reference deg, reading counts) on an indexing head: the reading the line gives at each
    angle, with a little ADC noise, rounded to a count."""
    angles = np.linspace(0.0, 270.0, 10)
    counts = np.round((angles - c0) / c1 + rng.normal(0.0, 0.4, angles.size))
    return list(zip(angles.tolist(), counts.tolist(), strict=True))


def _points_quadratic(rng: np.random.Generator) -> list[tuple[float, float]]:
    counts = np.linspace(0.0, 1000.0, 10)
    angles = 0.2 + 0.265 * counts + 5e-6 * counts**2 + rng.normal(0.0, 0.05, counts.size)
    return list(zip(angles.tolist(), counts.tolist(), strict=True))


def _calibrate(
    session: Session, serial: str, points: list[tuple[float, float]], family: str | None
) -> None:
    unit = fleet.get_unit(session, serial)
    data = CalibrationCreate(
        performed_at=datetime.now(UTC) - timedelta(days=10),
        operator=TECHNICIAN[0],
        reference="dividing head DH-9",
        reference_expanded_u=0.05,
        kind=SessionKind.incoming,
        family=family,
        points=[PointIn(reference_value=v, reading=r) for v, r in points],
    )
    run_calibration(session, unit, data, recorded_by=TECHNICIAN[0])


def build_line_pot_fleet(url: str) -> None:
    engine = make_engine(url)
    rng = np.random.default_rng(20261202)
    with make_sessionmaker(engine)() as session:
        fleet.create_sensor_type(
            session,
            SensorTypeCreate(
                name=LINE_POT,
                quantity="angle",
                value_unit="deg",
                reading_unit="counts",
                reading_min=0,
                reading_max=1023,
                families=["line", "polynomial"],
                family_options={"polynomial": {"degree": 2}},
                tolerance_abs=1.5,
                noise_in=NoiseIn.reading,
                reading_resolution=1,
            ),
        )
        for i in range(1, 18):
            fleet.create_unit(session, UnitCreate(serial=f"LP-{i:04d}", sensor_type=LINE_POT))
        for i in range(1, 13):
            c1 = SLOPE * (1.0 + 0.01 * rng.normal())
            _calibrate(session, f"LP-{i:04d}", _points_line(rng, rng.normal(0, 0.3), c1), "line")
        _calibrate(session, ODD, _points_line(rng, 0.1, ODD_SLOPE), "line")
        _calibrate(session, RETIRED, _points_line(rng, 0.0, 0.5), "line")
        for serial in QUADRATIC:
            _calibrate(session, serial, _points_quadratic(rng), "polynomial")
        fleet.get_unit(session, RETIRED).status = UnitStatus.retired
        session.flush()
        recompute_all(session)
        session.commit()
    engine.dispose()


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("fleet-view") / "sensorledger.db"
    seed(f"sqlite:///{path}")
    build_line_pot_fleet(f"sqlite:///{path}")
    return path


# -- helpers ---------------------------------------------------------------------------------------


def page_url(name: str) -> str:
    return f"/types/{quote(name, safe='')}"


def figure(html: str, element_id: str) -> dict[str, Any]:
    found = re.search(rf'id="{element_id}"[^>]*data-figure="([^"]+)"', html)
    assert found, f"no figure #{element_id}"
    return dict(json.loads(unescape(found.group(1))))


def array(v: Any) -> np.ndarray:
    """A plotly JSON array: a list (None for gaps) or base64 typed data."""
    if isinstance(v, dict) and "bdata" in v:
        return np.frombuffer(base64.b64decode(v["bdata"]), dtype=np.dtype(v["dtype"])).astype(float)
    return np.array([np.nan if x is None else x for x in v], dtype=float)


def current_fits(app: Any, type_name: str) -> dict[str, shared.Fit]:
    """Serial -> stored current fit of the newest valid session, unretired units only: read
    straight from the database."""
    out = {}
    with app.state.sessionmaker() as s:
        units = s.scalars(
            sa.select(Unit)
            .where(Unit.sensor_type.has(name=type_name), Unit.status != UnitStatus.retired)
            .options(selectinload(Unit.sessions).selectinload(CalibrationSession.fits))
        ).all()
        for unit in units:
            valid = [
                c
                for c in unit.sessions
                if c.voided_at is None and any(f.is_current for f in c.fits)
            ]
            if valid:
                last = max(valid, key=lambda c: (c.performed_at, c.id))
                record = next(f for f in last.fits if f.is_current)
                out[unit.serial] = shared.Fit.from_dict(record.result)
    return out


def open_outliers(app: Any) -> dict[str, Flag]:
    with app.state.sessionmaker() as s:
        flags = s.scalars(
            sa.select(Flag)
            .options(selectinload(Flag.unit))
            .where(Flag.kind == FlagKind.fleet_outlier, Flag.open.is_(True))
        ).all()
        return {f.unit.serial: f for f in flags}


# -- tests -----------------------------------------------------------------------------------------


def test_curves_one_per_unit_odd_one_named_and_highlighted(client, app) -> None:
    html = client.get(page_url(LINE_POT)).text
    assert '<script src="/static/vendor/plotly.min.js" defer></script>' in html
    fits = current_fits(app, LINE_POT)
    assert RETIRED not in fits and UNCALIBRATED not in fits and len(fits) == 15

    flags = open_outliers(app)
    assert flags[ODD].severity is Severity.action  # the fixture's premise

    traces = figure(html, "fleet-curves")["data"]
    units = [t for t in traces if t.get("name") in fits]
    assert sorted(t["name"] for t in units) == sorted(fits)  # one trace each, none retired
    assert not [t for t in traces if t.get("name") in (RETIRED, UNCALIBRATED)]

    plain = [t for t in units if t["name"] not in flags]
    odd = next(t for t in units if t["name"] == ODD)
    assert plain, "some units have no flag"
    assert odd["showlegend"] is not False and all(t["showlegend"] is False for t in plain)
    assert {t["line"]["color"] for t in plain}.isdisjoint({odd["line"]["color"]})
    assert odd["line"]["width"] > max(t["line"]["width"] for t in plain)
    assert ODD in odd["hovertemplate"]

    for t in units:
        fit = fits[t["name"]]
        x, y = array(t["x"]), array(t["y"])
        assert 2 <= x.size <= 60
        assert x.min() == pytest.approx(fit.valid_range[0]) and x.max() == pytest.approx(
            fit.valid_range[1]
        )
        np.testing.assert_allclose(y, fit.to_value(x), rtol=1e-12)
    # the odd unit once more, from its stored constants alone
    x, y = array(odd["x"]), array(odd["y"])
    c = fits[ODD].params
    np.testing.assert_allclose(y, c["c0"] + c["c1"] * x, rtol=1e-9)


def test_fleet_median_curve_where_half_the_units_are_in_range(client, app) -> None:
    html = client.get(page_url(LINE_POT)).text
    median = next(t for t in figure(html, "fleet-curves")["data"] if t["name"] == "fleet median")
    assert median["line"]["dash"] == "dash"
    fits = list(current_fits(app, LINE_POT).values())
    x, y = array(median["x"]), array(median["y"])
    assert x.size <= 60
    shown = np.isfinite(y)
    assert shown.sum() > x.size // 2
    for r, got in zip(x, y, strict=True):
        values = [
            f.params["c0"] + f.params["c1"] * r
            if f.family == "line"
            else f.params["c0"] + f.params["c1"] * r + f.params["c2"] * r**2
            for f in fits
            if f.valid_range[0] <= r <= f.valid_range[1]
        ]
        if 2 * len(values) >= len(fits):
            assert got == pytest.approx(float(np.median(values)), rel=1e-9)
        else:
            assert np.isnan(got)


def test_parameter_spreads_mark_median_and_three_made(client, app) -> None:
    html = client.get(page_url(LINE_POT)).text
    # two families in use: the sentence says so, and the line's constants are shown
    text = re.sub(r"<[^>]+>", "", html)
    assert re.search(r"line\s*\(13 units\),\s*polynomial\s*\(2 units\)", text)
    line_fits = {s: f for s, f in current_fits(app, LINE_POT).items() if f.family == "line"}
    assert len(line_fits) == 13
    flags = open_outliers(app)
    for i, name in enumerate(("c0", "c1"), start=1):
        fig = figure(html, f"param-{i}")
        assert fig["layout"]["xaxis"]["title"]["text"] == name
        values = np.array([f.params[name] for f in line_fits.values()])
        expected_median = float(np.median(values))
        made = float(stats.median_abs_deviation(values, scale=1 / ISO_MAD_FACTOR))
        made_normal = float(stats.median_abs_deviation(values, scale="normal"))
        assert made == pytest.approx(made_normal, rel=5e-4)  # 1.483 against 1.482602...

        traces = {t.get("name"): t for t in fig["data"]}
        got_median = array(traces["median"]["x"])
        assert got_median == pytest.approx([expected_median] * 2, rel=1e-12)
        lo, _, _, hi, _ = array(traces["median ± 3 MADe"]["x"])
        assert lo == pytest.approx(expected_median - 3 * made, rel=1e-9, abs=1e-12)
        assert hi == pytest.approx(expected_median + 3 * made, rel=1e-9, abs=1e-12)
        assert lo == pytest.approx(expected_median - 3 * made_normal, rel=1e-3, abs=1e-9)

        dots = [t for t in fig["data"] if t.get("mode") == "markers"]
        serials = [s for t in dots for s in t["text"]]
        assert sorted(serials) == sorted(line_fits)  # every line unit once, nothing else
        for t in dots:
            for serial, x in zip(t["text"], array(t["x"]), strict=True):
                assert x == pytest.approx(line_fits[serial].params[name], rel=1e-12)
        odd_dots = next(t for t in dots if ODD in t["text"])
        plain = next(t for t in dots if not set(t["text"]) & set(flags))
        assert odd_dots["marker"]["color"] != plain["marker"]["color"]
    # the odd slope lies beyond +3 MADe of the slopes
    slopes = np.array([f.params["c1"] for f in line_fits.values()])
    made_c1 = stats.median_abs_deviation(slopes, scale=1 / ISO_MAD_FACTOR)
    assert line_fits[ODD].params["c1"] > np.median(slopes) + 3 * made_c1


def test_outlier_table_lists_open_flags_with_their_z(client, app) -> None:
    html = client.get(page_url(LINE_POT)).text
    flags = open_outliers(app)
    table = re.search(r'<table class="numbers fleet-outliers".*?</table>', html, re.S)
    assert table
    rows = re.findall(r"<tr class=\"outlier-(\w+)\">(.*?)</tr>", table.group(0), re.S)
    lp_flags = {s: f for s, f in flags.items() if s.startswith("LP-")}
    assert len(rows) == len(lp_flags) >= 1
    for severity, row in rows:
        serial = re.search(r'<a href="/units/([^"]+)">', row).group(1)
        flag = lp_flags[serial]
        assert severity == flag.severity.value
        assert f"{flag.evidence['z']:+.2f}" in row
    assert f'href="/units/{ODD}"' in table.group(0)
    assert RETIRED not in table.group(0)


def test_fewer_than_two_calibrated_units_say_so_without_a_figure(client) -> None:
    html = client.get(page_url(POT_TYPE)).text  # one calibrated unit in the seed
    assert 'id="fleet"' in html
    assert "Only one unit of this type is calibrated" in html
    assert "data-figure" not in html
    assert "plotly.min.js" not in html


@pytest.mark.parametrize("name", [IR_TYPE, POT_TYPE, LINE_POT])
def test_type_pages_render(client, viewer, name) -> None:
    for who in (client, viewer):
        answer = who.get(page_url(name))
        assert answer.status_code == 200, answer.text[:500]
        assert 'id="fleet-title"' in answer.text


def test_two_calibrated_units_are_drawn_but_not_judged(client, app) -> None:
    html = client.get(page_url(IR_TYPE)).text
    fits = current_fits(app, IR_TYPE)
    assert len(fits) == 2
    traces = figure(html, "fleet-curves")["data"]
    assert sorted(t["name"] for t in traces if t.get("name") in fits) == sorted(fits)
    assert "no unit is flagged" in html


def test_job_polling_block_skips_the_fleet(client, app) -> None:
    """The htmx fragment of a refit job carries no figure (it is polled every second)."""
    with app.state.sessionmaker() as s:
        st = s.scalar(sa.select(SensorType).where(SensorType.name == LINE_POT))
        job = refits.start_refit(s, st, "test", "tess")
        s.commit()
        job_id = job.id
    block = client.get(f"{page_url(LINE_POT)}/jobs/{job_id}", headers={"HX-Request": "true"})
    assert block.status_code == 200
    assert "data-figure" not in block.text
    whole = client.get(f"{page_url(LINE_POT)}/jobs/{job_id}")
    assert 'id="fleet-curves"' in whole.text


def test_fleet_median_is_left_out_where_fewer_than_half_are_in_range() -> None:
    """Five lines over different ranges: between 4 and 6 only two of five cover the reading."""
    ranges = [(0, 10), (0, 10), (0, 4), (0, 4), (6, 10)]
    fits = []
    for k, (lo, hi) in enumerate(ranges):
        r = np.linspace(lo, hi, 6)
        wobble = 0.01 * np.array([1, -1, 0, 1, -1, 0])
        fits.append(shared.fit("line", r, 1.0 + k + 2.0 * r + wobble))
    reading, median = charts.fleet_median(fits, n=41)
    for r, got in zip(reading, median, strict=True):
        inside = [f for f, (lo, hi) in zip(fits, ranges, strict=True) if lo <= r <= hi]
        if 2 * len(inside) < len(fits):
            assert np.isnan(got), r
        else:
            expected = np.median([f.params["c0"] + f.params["c1"] * r for f in inside])
            assert got == pytest.approx(expected, rel=1e-12)
    assert np.isnan(median[(reading > 4) & (reading < 6)]).all()
    assert np.isfinite(median[(reading <= 4) | (reading >= 6)]).all()


# -- the difference from the fleet median ------------------------------------------------------


def expected_median(fits: list[shared.Fit], r: float) -> float:
    """The median value at reading ``r`` of the units whose valid range holds it; NaN when fewer
    than half the units do (the rule of the median line)."""
    values = [float(f.to_value(r)) for f in fits if f.valid_range[0] <= r <= f.valid_range[1]]
    return float(np.median(values)) if 2 * len(values) >= len(fits) else np.nan


def test_differences_are_each_unit_minus_the_fleet_median(client, app) -> None:
    html = client.get(page_url(LINE_POT)).text
    fits = current_fits(app, LINE_POT)
    assert len(fits) == 15
    all_fits = list(fits.values())
    traces = figure(html, "fleet-differences")["data"]
    units = [t for t in traces if t.get("name") in fits]
    assert sorted(t["name"] for t in units) == sorted(fits)  # one trace each, none retired
    assert not [t for t in traces if t.get("name") in (RETIRED, UNCALIBRATED)]

    # the readings are the median line's, where it is drawn
    median = next(t for t in figure(html, "fleet-curves")["data"] if t["name"] == "fleet median")
    grid, median_y = array(median["x"]), array(median["y"])
    drawn = np.flatnonzero(np.isfinite(median_y))
    span = grid[drawn[0] : drawn[-1] + 1]
    for t in units:
        np.testing.assert_array_equal(array(t["x"]), span)

    centre = np.array([expected_median(all_fits, r) for r in span])
    assert np.isfinite(centre).sum() > span.size // 2
    for t in units:
        fit = fits[t["name"]]
        expected = fit.to_value(span) - centre  # NaN out of the unit's range or the median's
        np.testing.assert_allclose(array(t["y"]), expected, rtol=0, atol=1e-9)
        assert ODD in t["hovertemplate"] if t["name"] == ODD else t["name"] in t["hovertemplate"]

    # the odd unit once more, from its stored constants alone, where every unit is in range
    odd = next(t for t in units if t["name"] == ODD)
    c = fits[ODD].params
    x, y = array(odd["x"]), array(odd["y"])
    inside = np.isfinite(y)
    assert inside.sum() >= 10
    np.testing.assert_allclose(y[inside], c["c0"] + c["c1"] * x[inside] - centre[inside], atol=1e-9)

    zero = next(t for t in traces if t.get("name") == "fleet median (zero)")
    assert zero["line"]["dash"] == "dash"
    zero_y = array(zero["y"])
    np.testing.assert_array_equal(np.isfinite(zero_y), np.isfinite(centre))
    assert np.all(zero_y[np.isfinite(zero_y)] == 0.0)


def test_differences_highlight_the_odd_unit_like_the_curves(client, app) -> None:
    html = client.get(page_url(LINE_POT)).text
    flags = open_outliers(app)
    assert flags[ODD].severity is Severity.action
    fits = current_fits(app, LINE_POT)
    traces = figure(html, "fleet-differences")["data"]
    units = [t for t in traces if t.get("name") in fits]
    plain = [t for t in units if t["name"] not in flags]
    odd = next(t for t in units if t["name"] == ODD)
    assert plain
    assert odd["showlegend"] is not False and all(t["showlegend"] is False for t in plain)
    assert all(t["legendgroup"] == "fleet" for t in plain)
    grey = [t for t in traces if t.get("legendgroup") == "fleet" and t["name"] not in fits]
    assert len(grey) == 1 and f"({len(plain)})" in grey[0]["name"]  # one legend entry for them
    assert odd["line"]["color"] not in {t["line"]["color"] for t in plain}
    assert odd["line"]["width"] > max(t["line"]["width"] for t in plain)
    assert odd["line"]["dash"] == "solid"
    # drawn on top of the grey lines
    assert traces.index(odd) > max(traces.index(t) for t in plain)
    # and it is the unit farthest from the median
    spread = {t["name"]: np.nanmax(np.abs(array(t["y"]))) for t in units}
    assert max(spread, key=spread.__getitem__) == ODD
    assert "difference from the fleet median" in html


@pytest.mark.parametrize("tolerance", [(None, None), (0.4, 0.8)])
def test_tolerance_lines_around_zero(client, app, tolerance) -> None:
    """The fixture's tolerance (1.5 deg), then one with a relative part set on the type."""
    if tolerance != (None, None):
        with app.state.sessionmaker() as s:
            st = s.scalar(sa.select(SensorType).where(SensorType.name == LINE_POT))
            st.tolerance_abs, st.tolerance_rel = tolerance
            s.commit()
    with app.state.sessionmaker() as s:
        st = s.scalar(sa.select(SensorType).where(SensorType.name == LINE_POT))
        tol_abs, tol_rel = st.tolerance_abs or 0.0, st.tolerance_rel or 0.0
    assert tol_abs == (1.5 if tolerance == (None, None) else 0.4)

    html = client.get(page_url(LINE_POT)).text
    all_fits = list(current_fits(app, LINE_POT).values())
    lines = [
        t for t in figure(html, "fleet-differences")["data"] if t.get("legendgroup") == "tolerance"
    ]
    assert len(lines) == 2
    assert sum(t.get("showlegend", True) is not False for t in lines) == 1
    upper, lower = sorted(lines, key=lambda t: -np.nanmean(array(t["y"])))
    x = array(upper["x"])
    np.testing.assert_array_equal(array(lower["x"]), x)
    centre = np.array([expected_median(all_fits, r) for r in x])
    allowed = tol_abs + tol_rel / 100.0 * np.abs(centre)
    np.testing.assert_allclose(array(upper["y"]), allowed, rtol=1e-12)
    np.testing.assert_allclose(array(lower["y"]), -allowed, rtol=1e-12)
    for t in lines:
        assert t["line"]["dash"] == "dash"
    if tol_rel:  # the relative part really varies along the readings
        finite = allowed[np.isfinite(allowed)]
        assert finite.max() - finite.min() > 1.0
    assert "red dashed" in html


def test_fewer_than_two_calibrated_units_have_no_difference_plot(client) -> None:
    html = client.get(page_url(POT_TYPE)).text  # one calibrated unit in the seed
    assert "Only one unit of this type is calibrated" in html
    assert 'id="fleet-differences"' not in html
    assert "difference from the fleet median" not in html


def test_two_calibrated_units_differ_from_their_mean_by_half_their_gap(client, app) -> None:
    html = client.get(page_url(IR_TYPE)).text
    fits = current_fits(app, IR_TYPE)
    assert len(fits) == 2
    traces = {
        t["name"]: t for t in figure(html, "fleet-differences")["data"] if t.get("name") in fits
    }
    (a, fa), (b, fb) = sorted(fits.items())
    x = array(traces[a]["x"])
    gap = (fa.to_value(x) - fb.to_value(x)) / 2  # NaN unless both are in range
    both = np.isfinite(gap)
    assert both.sum() >= 10
    np.testing.assert_allclose(array(traces[a]["y"])[both], gap[both], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(array(traces[b]["y"])[both], -gap[both], rtol=1e-9, atol=1e-9)


def _lines(ranges: list[tuple[float, float]]) -> list[charts.Member]:
    members = []
    for k, (lo, hi) in enumerate(ranges):
        r = np.linspace(lo, hi, 6)
        wobble = 0.01 * np.array([1, -1, 0, 1, -1, 0])
        fit = shared.fit("line", r, 1.0 + k + 2.0 * r + wobble)
        members.append(charts.Member(serial=f"U{k}", fit=fit))
    return members


def test_differences_leave_a_gap_where_the_median_is_not_drawn() -> None:
    """Five lines over different ranges: between 4 and 6 only two of five cover the reading."""
    ranges = [(0, 10), (0, 10), (0, 4), (0, 4), (6, 10)]
    members = _lines(ranges)
    axes = charts.Axes("angle", "deg", "counts")
    grid = charts.fleet_grid([m.fit for m in members], n=41)
    fig = charts.difference_figure(members, axes, grid, tolerance_abs=None, tolerance_rel=None)
    assert fig is not None
    data = json.loads(fig.to_json())["data"]
    assert not [t for t in data if t.get("legendgroup") == "tolerance"]  # no tolerance: no lines
    for m, (lo, hi) in zip(members, ranges, strict=True):
        t = next(t for t in data if t.get("name") == m.serial)
        x, y = array(t["x"]), array(t["y"])
        for r, got in zip(x, y, strict=True):
            inside = [f.fit for f, (a, b) in zip(members, ranges, strict=True) if a <= r <= b]
            if 2 * len(inside) < len(members) or not lo <= r <= hi:
                assert np.isnan(got), (m.serial, r)
            else:
                centre = np.median([f.params["c0"] + f.params["c1"] * r for f in inside])
                own = m.fit.params["c0"] + m.fit.params["c1"] * r
                assert got == pytest.approx(own - centre, abs=1e-12)
        assert np.isnan(y[(x > 4) & (x < 6)]).all()


def test_no_difference_plot_where_the_median_is_nowhere_drawn() -> None:
    members = _lines([(0, 3), (4, 7), (8, 11)])  # never two of three in range together
    grid = charts.fleet_grid([m.fit for m in members])
    assert np.isnan(grid.median).all()
    axes = charts.Axes("angle", "deg", "counts")
    assert (
        charts.difference_figure(members, axes, grid, tolerance_abs=1.0, tolerance_rel=None) is None
    )
