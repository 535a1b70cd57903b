"""The register's pages without a browser: /standards (standings in words, the register form, a
form to fix), a standard's page (certificate, checks, dependent units and their CSV, the check
form that flags the units at risk), the picker in the calibration forms, and the standards on
Needs attention."""

from __future__ import annotations

import csv
import io
import re
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest

from server.app import create_app
from server.calibrations import service as calibrations
from server.calibrations.models import SessionKind
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.config import Settings
from server.fleet import service as fleet
from server.standards import service as standards
from server.standards.schemas import StandardCreate
from tests.web.seed import TECHNICIAN, Fleet, seed

FLEET = Fleet()
TODAY = datetime.now(UTC).date()


def add_standard(session: Any, name: str, due: date, value_unit: str = "deg") -> None:
    standards.create_standard(
        session,
        StandardCreate(
            name=name,
            description="invented test standard",
            quantity="angle",
            value_unit=value_unit,
            expanded_u=0.08,
            k=2,
            certificate=f"LAB-{name}",
            calibrated_on=TODAY - timedelta(days=300),
            due_on=due,
        ),
        "tess",
    )


def pot_points() -> list[PointIn]:
    """value = angle, reading = 3.7 angle + 12 counts, no noise (common practice, no source)."""
    return [PointIn(reference_value=a, reading=3.7 * a + 12) for a in range(0, 271, 30)]


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("standards") / "sensorledger.db"
    url = f"sqlite:///{path}"
    seed(url)
    app = create_app(Settings(database_url=url))
    with app.state.sessionmaker() as session:
        add_standard(session, "HEAD-OK", TODAY + timedelta(days=200))
        add_standard(session, "HEAD-SOON", TODAY + timedelta(days=12))
        add_standard(session, "HEAD-LATE", TODAY - timedelta(days=4))
        unit = fleet.get_unit(session, FLEET.pot)
        unit.installed_in = "arm 7"
        calibrations.run_calibration(
            session,
            unit,
            CalibrationCreate(
                performed_at=datetime.now(UTC) - timedelta(days=2),
                operator=TECHNICIAN[0],
                reference_standard="HEAD-OK",
                kind=SessionKind.periodic,
                points=pot_points(),
            ),
            recorded_by=TECHNICIAN[0],
        )
        session.commit()
    app.state.engine.dispose()
    return path


def text_of(html: str) -> str:
    return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html))


def test_the_list_marks_standings_in_words(client):
    r = client.get("/standards")
    assert r.status_code == 200
    rows = re.findall(r"<tr class=\"standing-row-(\w+)\">.*?</tr>", r.text, re.S)
    assert rows == ["overdue", "due_soon", "ok"]  # soonest due first
    words = text_of(r.text)
    assert "HEAD-LATE" in words and "⚠ Overdue" in words and "Due soon" in words
    assert "does not replace" in words  # the caution beside the register
    assert 'href="/standards"' in r.text  # the nav link


def test_the_list_filters_by_name_and_a_scan_opens_a_standard(client):
    assert "HEAD-OK" not in client.get("/standards?q=late").text.split("<tbody>")[1]
    r = client.get("/standards/find?q=head-soon", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/standards/HEAD-SOON"


def test_register_through_the_form_and_fix_a_bad_one(client, viewer):
    form = {
        "name": "RAIL-9",
        "quantity": "distance",
        "value_unit": "mm",
        "expanded_u": "0.2",
        "k": "2",
        "certificate": "C-9",
        "calibrated_on": (TODAY - timedelta(days=10)).isoformat(),
        "due_on": (TODAY + timedelta(days=355)).isoformat(),
    }
    bad = client.post("/standards", data={**form, "expanded_u": "lots"})
    assert bad.status_code == 422
    assert 'id="std-u" name="expanded_u" value="lots"' in bad.text
    assert 'aria-invalid="true"' in bad.text and "Not registered" in bad.text
    ok = client.post("/standards", data=form, follow_redirects=False)
    assert ok.status_code == 303 and ok.headers["location"] == "/standards/RAIL-9"
    again = client.post("/standards", data=form)
    assert again.status_code == 409 and "exists already" in again.text
    # viewers see the register but no form, and cannot post one
    assert 'action="/standards"' not in viewer.get("/standards").text
    assert viewer.post("/standards", data={**form, "name": "RAIL-10"}).status_code == 403


def test_a_standard_page_lists_its_units_and_their_csv(client):
    r = client.get("/standards/head-ok")
    assert r.status_code == 200
    words = text_of(r.text)
    assert "LAB-HEAD-OK" in words and "U = 0.08 deg, k = 2" in words
    assert FLEET.pot in words and "arm 7" in words
    csv_answer = client.get("/standards/HEAD-OK/units.csv")
    assert csv_answer.status_code == 200
    assert csv_answer.headers["content-type"].startswith("text/csv")
    assert "HEAD-OK-units.csv" in csv_answer.headers["content-disposition"]
    rows = list(csv.DictReader(io.StringIO(csv_answer.text)))
    assert [(r["serial"], r["installed_in"], r["since_last_good_check"]) for r in rows] == [
        (FLEET.pot, "arm 7", "yes")
    ]
    assert client.get("/standards/NOPE").status_code == 404


def test_a_failed_check_through_the_form_flags_and_shows_on_needs_attention(client):
    bad = client.post(
        "/standards/HEAD-OK/checks",
        data={"checked_on": TODAY.isoformat(), "in_tolerance": "", "note": "x"},
    )
    assert bad.status_code == 422 and "in tolerance" in text_of(bad.text)
    r = client.post(
        "/standards/HEAD-OK/checks",
        data={"checked_on": TODAY.isoformat(), "in_tolerance": "no", "note": "plate chipped"},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == "/standards/HEAD-OK?flagged=1#checks"
    page = text_of(client.get("/standards/HEAD-OK?flagged=1").text)
    assert "1 unit calibrated against it" in page and "Out of tolerance" in page
    attention = text_of(client.get("/attention").text)
    assert "Calibrated against a suspect standard" in attention
    assert "HEAD-OK" in attention and "arm 7" in attention
    # the standards part of Needs attention: overdue, due soon and suspect ones, named
    assert "HEAD-LATE" in attention and "HEAD-SOON" in attention


def test_the_calibration_forms_offer_the_register(client):
    for url in (f"/units/{FLEET.pot}", f"/calibrate?unit={FLEET.pot}"):
        html = client.get(url).text
        assert 'list="reference-standards"' in html, url
        options = re.findall(r'<option value="([^"]+)">', html.split('id="reference-standards"')[1])
        assert {"HEAD-OK", "HEAD-SOON", "HEAD-LATE"} <= set(options), url


def unit_form(**changes: str) -> dict[str, str]:
    points = "\n".join(f"{p.reference_value:g}, {p.reading:g}" for p in pot_points())
    return {
        "performed_at": (datetime.now(UTC) - timedelta(hours=1)).strftime("%Y-%m-%dT%H:%M"),
        "operator": "tess",
        "reference": "",
        "reference_standard": "HEAD-SOON",
        "kind": "periodic",
        "points": points,
        "reference_expanded_u": "",
        "reference_k": "2",
        **changes,
    }


def test_the_unit_form_calibrates_against_a_named_standard(client):
    wrong = client.post(
        f"/units/{FLEET.pot}/calibrations", data=unit_form(reference_expanded_u="0.5")
    )
    assert wrong.status_code == 422
    assert 'id="reference_expanded_u"' in wrong.text and "differs from the register" in wrong.text
    unknown = client.post(
        f"/units/{FLEET.pot}/calibrations", data=unit_form(reference_standard="NOPE")
    )
    assert unknown.status_code == 422 and "no reference standard" in unknown.text
    saved = client.post(
        f"/units/{FLEET.pot}/calibrations", data=unit_form(), follow_redirects=False
    )
    assert saved.status_code == 303
    page = text_of(client.get(saved.headers["location"]).text)
    assert "against HEAD-SOON" in page and "U = 0.08 deg, k = 2" in page
    # the next form offers the same standard, U and k left to the register
    assert re.search(
        r'name="reference_standard"[^>]*value="HEAD-SOON"', client.get(f"/units/{FLEET.pot}").text
    )


def test_the_preview_judges_with_the_standard_and_names_an_overdue_one(client):
    form = unit_form(reference_standard="head-late")
    form["unit"] = FLEET.pot
    r = client.post("/calibrate/preview", data=form, headers={"HX-Request": "true"})
    assert r.status_code == 200
    words = text_of(r.text)
    assert "FAIL" in words and "HEAD-LATE was overdue" in words
    form["reference_standard"] = "HEAD-OK"
    good = text_of(
        client.post("/calibrate/preview", data=form, headers={"HX-Request": "true"}).text
    )
    assert "PASS" in good
