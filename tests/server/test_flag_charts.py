"""The drift history (unit page) and the fleet-outlier evidence plot (needs attention), on the
demo fleet: every number is checked against an independent computation from the stored fits
(``shared.drift.compare`` and ``shared.fleet.due_date`` called here, robust statistics by hand).

Loaded once per backend (a SQLite file, and PostgreSQL when SENSORLEDGER_TEST_PG_URL is set).
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterator
from dataclasses import dataclass
from html import unescape

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

import shared
from server.app import create_app
from server.calibrations.models import CalibrationSession
from server.calibrations.pages import drift_context
from server.config import Settings
from server.db import make_engine, make_sessionmaker
from server.demo import DEMO_PASSWORD, DRIFTED_SERIAL, ODD_SERIAL, load_demo
from server.flags.charts import drift_history_figure, outlier_figure
from server.flags.models import Flag, FlagKind
from server.fleet.models import Unit, UnitStatus
from server.fleet.service import drift_history, unit_due
from server.migrate import upgrade
from shared.drift import compare
from shared.fleet import due_date
from tests.conftest import fresh_pg_database

GRID = 201  # the history's comparison grid (server.fleet.service.COMPARE_POINTS)
DRAWS = 100  # its draws (COMPARE_DRAWS): only the band half-width depends on them
MADE = 1.483  # MADe = 1.483 MAD, the factor the rule states (ISO 13528, rounded)


@dataclass
class Demo:
    url: str
    session: Session

    def unit(self, serial: str) -> Unit:
        return self.session.scalars(
            select(Unit)
            .where(Unit.serial == serial)
            .options(
                selectinload(Unit.sensor_type),
                selectinload(Unit.sessions).selectinload(CalibrationSession.fits),
            )
        ).one()

    def siblings(self, unit: Unit) -> list[Unit]:
        return list(
            self.session.scalars(
                select(Unit)
                .where(Unit.sensor_type_id == unit.sensor_type_id)
                .options(selectinload(Unit.sessions).selectinload(CalibrationSession.fits))
            )
        )

    def flag(self, serial: str, kind: FlagKind) -> Flag:
        return self.session.scalars(
            select(Flag).join(Flag.unit).where(Unit.serial == serial, Flag.kind == kind)
        ).one()


@pytest.fixture(
    scope="module", params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
)
def demo(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[Demo]:
    """The demo (flags recomputed by the load) in a fresh database of each backend."""

    def opened(url: str) -> Iterator[Demo]:
        engine = make_engine(url)
        upgrade(engine)
        with make_sessionmaker(engine)() as session:
            load_demo(session)
            session.commit()
        with make_sessionmaker(engine, read_only=True)() as session:  # held open: reads only
            yield Demo(url, session)
        engine.dispose()

    if request.param == "sqlite":
        yield from opened(f"sqlite:///{tmp_path_factory.mktemp('charts') / 'demo.db'}")
    else:
        with fresh_pg_database() as url:
            yield from opened(url)


def valid_fits(unit: Unit) -> list[tuple[CalibrationSession, shared.Fit]]:
    """Sessions that count (not voided, with a fit), oldest first, rebuilt from what was stored."""
    kept = sorted(
        (s for s in unit.sessions if s.voided_at is None and s.current_fit is not None),
        key=lambda s: s.performed_at,
    )
    return [(s, shared.Fit.from_dict(s.current_fit.result)) for s in kept]


def figures_in(html: str) -> list[dict]:
    return [json.loads(unescape(m)) for m in re.findall(r'data-figure="([^"]+)"', html)]


# -- drift history --------------------------------------------------------------------------------


def test_drift_history_is_compare_against_the_first_calibration(demo: Demo) -> None:
    unit = demo.unit(DRIFTED_SERIAL)
    sessions = valid_fits(unit)
    assert len(sessions) == 3
    (_, first), *later = sessions
    history = drift_history(unit)
    assert [p.session_id for p in history] == [s.id for s, _ in sessions]
    assert [p.on for p in history] == [s.performed_at.date() for s, _ in sessions]
    assert history[0].deviation == 0.0 and history[0].at_reading is None
    for point, (_, fit) in zip(history[1:], later, strict=True):
        expected = compare(first, fit, points=GRID, draws=DRAWS)
        assert point.deviation == pytest.approx(expected.max_deviation, rel=1e-12)
        assert point.at_reading == pytest.approx(expected.at_reading, rel=1e-12)
        assert point.at_value == pytest.approx(expected.at_value, rel=1e-12)
        assert point.band == pytest.approx(
            float(np.max(expected.band[expected.reading == point.at_reading]))
        )
    # the story: the third calibration reads far off (a signed deviation, beyond the 8 mm limit)
    assert abs(history[-1].deviation) > unit.sensor_type.drift_limit_abs


def test_unit_due_is_due_date_on_that_history(demo: Demo) -> None:
    """unit_due is unchanged: shared.fleet.due_date on |deviation| with the threshold of its
    docstring (tolerance at the newest largest deviation's value, or the drift limit)."""
    unit = demo.unit(DRIFTED_SERIAL)
    st = unit.sensor_type
    (_, first), *later = valid_fits(unit)
    compared = [compare(first, fit, points=GRID, draws=DRAWS) for _, fit in later]
    dates = [s.performed_at.date() for s, _ in valid_fits(unit)]
    history = [(dates[0], 0.0)] + [
        (d, abs(c.max_deviation)) for d, c in zip(dates[1:], compared, strict=True)
    ]
    tolerance = st.tolerance_abs + st.tolerance_rel / 100 * abs(compared[-1].at_value)
    expected = due_date(
        dates[-1],
        st.interval_days,
        history,
        tolerance,
        drift_limit=st.drift_limit_abs,
        unit=st.value_unit,
    )
    assert unit_due(unit) == expected
    assert unit_due(unit, history=drift_history(unit)) == expected
    assert expected.decided_by == "crossing"  # the story: drift brings the due date forward


def test_drift_history_figure_carries_the_numbers_and_the_limits(demo: Demo) -> None:
    unit = demo.unit(DRIFTED_SERIAL)
    st = unit.sensor_type
    (_, first), *later = valid_fits(unit)
    deviations = [0.0] + [
        compare(first, f, points=GRID, draws=DRAWS).max_deviation for _, f in later
    ]
    dates = [s.performed_at.date().isoformat() for s, _ in valid_fits(unit)]
    due = unit_due(unit)
    fig = drift_history_figure(
        drift_history(unit),
        value_unit=st.value_unit,
        reading_unit=st.reading_unit,
        drift_limit=st.drift_limit_abs,
        threshold=due.threshold,
        due=due,
    )
    data = fig.to_plotly_json()["data"]
    (main,) = [t for t in data if t["name"] == "largest deviation from the first curve"]
    assert list(main["x"]) == dates
    assert list(main["y"]) == pytest.approx(deviations, rel=1e-12)
    limit = [t for t in data if str(t["name"]).startswith("drift limit ±8 mm")]
    assert sorted(t["y"][0] for t in limit) == [-8.0, 8.0]
    assert all(t["y"][0] == t["y"][1] and t["line"]["dash"] == "dash" for t in limit)
    # here the threshold is the drift limit (8 mm < the tolerance), so no second pair of lines
    assert due.threshold == 8.0 and not [t for t in data if "threshold ±" in str(t["name"])]
    # the projection: 0 on the last calibration's date, the threshold (on the side the unit
    # drifted) on the due date, which is the projected crossing
    (projection,) = [t for t in data if str(t["name"]).startswith("projected drift")]
    assert list(projection["x"]) == [dates[-1], due.projected_crossing.isoformat()]
    assert list(projection["y"]) == [0.0, np.copysign(8.0, deviations[-1])]
    assert projection["line"]["dash"] == "dot"


def test_tolerance_threshold_is_drawn_when_it_is_the_smaller(demo: Demo) -> None:
    """Load cells: tolerance 0.2 N + 0.5 % of the value, drift limit 0.6 N. Where the tolerance
    at the newest largest deviation is the smaller, the due date projects against it and the unit
    page draws it apart from the drift limit."""
    drawn = 0
    for unit in demo.siblings(demo.unit("LC-2505-01")):
        st = unit.sensor_type
        fits = valid_fits(unit)
        if len(fits) < 2:
            continue
        newest = compare(fits[0][1], fits[-1][1], points=GRID, draws=DRAWS)
        tolerance = st.tolerance_abs + st.tolerance_rel / 100 * abs(newest.at_value)
        data = json.loads(drift_context(unit)["drift_json"])["data"]
        lines = [t for t in data if str(t["name"]).startswith("due-date threshold")]
        if tolerance < st.drift_limit_abs:
            assert sorted(t["y"][0] for t in lines) == pytest.approx([-tolerance, tolerance])
            assert all(t["line"]["dash"] == "dashdot" for t in lines)
            drawn += 1
        else:
            assert not lines
    assert drawn >= 1


def test_one_calibration_has_no_drift_history_figure(demo: Demo) -> None:
    unit = demo.unit(ODD_SERIAL)
    assert len(valid_fits(unit)) == 1
    history = drift_history(unit)
    assert len(history) == 1
    assert drift_history_figure(history, value_unit="mm", reading_unit="counts") is None


# -- fleet outliers -------------------------------------------------------------------------------


def test_outlier_evidence_per_probe(demo: Demo) -> None:
    flag = demo.flag(ODD_SERIAL, FlagKind.fleet_outlier)
    e = flag.evidence
    probes = np.array(e["probe_readings"])
    values, center, scale, z = (
        np.array(e[k], dtype=float)
        for k in ("probe_values", "probe_center", "probe_scale", "probe_z")
    )
    assert probes.size == values.size == center.size == scale.size == z.size >= 3
    # internally consistent, and the flag's z is the largest |z|
    assert z == pytest.approx((values - center) / scale, rel=1e-12)
    j = int(np.argmax(np.abs(z)))
    assert z[j] == pytest.approx(e["z"], rel=1e-12) and probes[j] == pytest.approx(e["at_reading"])
    # against the stored fits, by hand: the unit's curve at the probes; the median and MADe of
    # every (not retired, calibrated) unit of the type there
    unit = demo.unit(ODD_SERIAL)
    assert values == pytest.approx(valid_fits(unit)[-1][1].to_value(probes), rel=1e-12)
    fleet = np.array(
        [
            valid_fits(u)[-1][1].to_value(probes)
            for u in demo.siblings(unit)
            if u.status is not UnitStatus.retired and valid_fits(u)
        ]
    )
    assert len(fleet) == e["units_compared"]
    median = np.median(fleet, axis=0)
    assert center == pytest.approx(median, rel=1e-12)
    assert scale == pytest.approx(MADE * np.median(np.abs(fleet - median), axis=0), rel=1e-12)


def test_outlier_figure_shows_z_and_the_signal_lines(demo: Demo) -> None:
    e = demo.flag(ODD_SERIAL, FlagKind.fleet_outlier).evidence
    data = outlier_figure(e).to_plotly_json()["data"]
    (main,) = [t for t in data if t["name"] == "robust z"]
    assert list(main["x"]) == e["probe_readings"] and list(main["y"]) == e["probe_z"]
    action = [t for t in data if str(t["name"]).startswith("action")]
    warning = [t for t in data if str(t["name"]).startswith("warning")]
    assert sorted(t["y"][0] for t in action) == [-3.0, 3.0]
    assert all(t["line"]["dash"] == "dash" for t in action)
    assert sorted(t["y"][0] for t in warning) == [-2.0, 2.0]
    assert all(t["line"]["dash"] == "dot" for t in warning)
    # a flag stored before the per-probe arrays were kept has no plot
    older = {k: v for k, v in e.items() if not k.startswith("probe_") or k == "probe_readings"}
    assert outlier_figure(older) is None


# -- the pages ------------------------------------------------------------------------------------


@pytest.fixture
def browser_client(demo: Demo) -> Iterator[TestClient]:
    """Signed in as the demo's admin through the form (read-only use of the demo database)."""
    app = create_app(Settings(database_url=demo.url))
    with TestClient(app) as client:
        answer = client.post(
            "/signin",
            data={"name": "demo", "password": DEMO_PASSWORD, "next": "/"},
            follow_redirects=False,
        )
        assert answer.status_code == 303
        yield client
    app.state.engine.dispose()


def test_attention_page_plots_the_odd_unit(demo: Demo, browser_client: TestClient) -> None:
    flag = demo.flag(ODD_SERIAL, FlagKind.fleet_outlier)
    html = browser_client.get("/attention?kind=fleet_outlier").text
    card = re.search(rf'<article[^>]*id="flag-{flag.id}".*?</article>', html, re.S)
    assert card is not None and ODD_SERIAL in card.group(0)
    assert f'hx-get="/attention/flags/{flag.id}/chart" hx-trigger="revealed"' in card.group(0)
    chart = browser_client.get(f"/attention/flags/{flag.id}/chart", headers={"HX-Request": "true"})
    (figure,) = figures_in(chart.text)
    (main,) = [t for t in figure["data"] if t["name"] == "robust z"]
    assert list(main["y"]) == pytest.approx(flag.evidence["probe_z"], rel=1e-12)


def test_unit_page_drift_history(demo: Demo, browser_client: TestClient) -> None:
    html = browser_client.get(f"/units/{DRIFTED_SERIAL}").text
    (drift,) = [
        f
        for f in figures_in(html)
        if any(t.get("name") == "largest deviation from the first curve" for t in f["data"])
    ]
    unit = demo.unit(DRIFTED_SERIAL)
    (_, first), *later = valid_fits(unit)
    expected = [0.0] + [compare(first, f, points=GRID, draws=DRAWS).max_deviation for _, f in later]
    (main,) = [t for t in drift["data"] if t["name"] == "largest deviation from the first curve"]
    assert list(main["y"]) == pytest.approx(expected, rel=1e-12)
    # the open flags come before the plots, the installations after the history
    assert html.index('id="flags"') < html.index('id="curve-title"')
    assert html.index('id="drift-history"') < html.index('id="history"')
    assert html.index('id="history"') < html.index('id="installations"')
    single = browser_client.get(f"/units/{ODD_SERIAL}").text
    assert "Drift history needs a second calibration" in single and 'id="drift-plot"' not in single
