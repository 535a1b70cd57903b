"""The /calibrate and /receive pages without a browser: a preview that stores nothing and agrees
with an independent fit, bad points answered 422 with the reason, saving as the unit page does,
CSV uploads, roles, unknown serials, and receiving a batch all or nothing."""

from __future__ import annotations

import re
from datetime import UTC, datetime
from html import unescape
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import sqlalchemy as sa

from server.audit.models import AuditEntry
from server.calibrations.models import CalibrationSession, FitRecord, Point
from server.fleet.models import Unit
from server.fleet.service import unit_due
from tests.web.seed import POT_TYPE, TECHNICIAN, Fleet, seed

FLEET = Fleet()
HX = {"HX-Request": "true"}
# an invented bench run of a rotary pot: angle (deg) on a dividing head, reading (counts)
ANGLES = [0.0, 30.0, 60.0, 90.0, 120.0, 150.0, 180.0, 210.0, 240.0, 270.0]
READINGS = [12.0, 123.0, 234.0, 346.0, 456.0, 567.0, 679.0, 789.0, 900.0, 1011.0]


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("calibrate") / "sensorledger.db"
    seed(f"sqlite:///{path}")
    return path


def count(app: Any, model: Any) -> int:
    with app.state.sessionmaker() as s:
        return int(s.scalar(sa.select(sa.func.count()).select_from(model)) or 0)


def pasted(angles: list[float] = ANGLES, readings: list[float] = READINGS) -> str:
    return "angle_deg, reading\n" + "\n".join(
        f"{a:g}, {r:g}" for a, r in zip(angles, readings, strict=True)
    )


def form(**changes: Any) -> dict[str, Any]:
    data = {
        "unit": FLEET.pot,
        "performed_at": "2026-02-03T09:30",
        "operator": TECHNICIAN[0],
        "reference": "dividing head DH-1",
        "kind": "periodic",
        "family": "",
        "reference_expanded_u": "0.1",
        "reference_k": "2",
        "points": pasted(),
    }
    return {**data, **changes}


def data_value(html: str, attribute: str) -> float:
    found = re.search(rf'{attribute} data-value="([^"]+)"', html)
    assert found, f"no {attribute} in the answer"
    return float(found.group(1))


def independent_line(values: list[float], readings: list[float]) -> tuple[float, float]:
    """value = c0 + c1 r with the scatter in the reading: the reading regressed on the value by
    numpy.polyfit (ordinary least squares), then inverted exactly."""
    slope, intercept = np.polyfit(values, readings, 1)
    return -intercept / slope, 1.0 / slope


def stored_rows(app: Any) -> dict[str, int]:
    return {
        "sessions": count(app, CalibrationSession),
        "points": count(app, Point),
        "fits": count(app, FitRecord),
        "audit": count(app, AuditEntry),
    }


# -- /calibrate ---------------------------------------------------------------------------------
def test_preview_stores_nothing_and_agrees_with_an_independent_fit(app, client) -> None:
    before = stored_rows(app)
    answer = client.post("/calibrate/preview", data=form(family="line"), headers=HX)
    assert answer.status_code == 200
    html = answer.text
    assert html.lstrip().startswith('<section id="preview"') and "<html" not in html
    assert stored_rows(app) == before  # nothing written, not even an audit entry

    c0, c1 = independent_line(ANGLES, READINGS)
    assert data_value(html, 'data-param="c0"') == pytest.approx(c0, rel=1e-8, abs=1e-9)
    assert data_value(html, 'data-param="c1"') == pytest.approx(c1, rel=1e-8)
    residuals = np.array(ANGLES) - (c0 + c1 * np.array(READINGS))
    worst = residuals[np.argmax(np.abs(residuals))]
    assert data_value(html, 'id="preview-largest"') == pytest.approx(worst, rel=1e-6)
    assert data_value(html, 'id="preview-dof"') == len(ANGLES) - 2
    # the tolerance is 1.5 deg and every residual is far inside it: the decision and its rule
    assert np.abs(residuals).max() < 1.5
    assert (
        "badge-pass" in html
        and "<strong>Rule.</strong> Simple acceptance (ILAC-G8:2019): pass when every residual"
        in html
    )
    assert 'id="preview-curve"' in html and 'id="preview-residuals"' in html
    figure = re.search(r'id="preview-residuals"[^>]*data-figure="([^"]+)"', html)
    assert figure and "tolerance" in unescape(figure.group(1))


def test_preview_without_javascript_is_the_whole_page_with_the_preview(app, client) -> None:
    before = stored_rows(app)
    answer = client.post("/calibrate/preview", data=form())
    assert answer.status_code == 200
    html = answer.text
    assert "<html" in html and 'id="entry"' in html and 'id="preview-curve"' in html
    assert "angle_deg, reading\n0, 12" in unescape(html)  # what was typed is kept
    assert 'value="dividing head DH-1"' in html
    assert stored_rows(app) == before


def test_preview_with_bad_points_answers_422_with_the_reason(app, client) -> None:
    before = stored_rows(app)
    bad = client.post("/calibrate/preview", data=form(points="0, 12\n30, 1x3\n60, 234"), headers=HX)
    assert bad.status_code == 422
    assert bad.text.lstrip().startswith('<section id="preview"')
    assert "Line 2" in bad.text and "1x3" in bad.text

    flat = "\n".join(f"{a:g}, 500" for a in ANGLES)  # the reading never moves: no line fits
    unfit = client.post("/calibrate/preview", data=form(points=flat, family="line"), headers=HX)
    assert unfit.status_code == 422 and "cannot fit line" in unfit.text.lower()

    one = client.post("/calibrate/preview", data=form(points="0, 12"), headers=HX)
    assert one.status_code == 422 and "at least two points" in one.text

    page = client.post("/calibrate/preview", data=form(points="0, 12\n30, 1x3"))
    assert page.status_code == 422 and "<html" in page.text
    assert re.search(r'<textarea id="points"[^>]*aria-invalid="true"', page.text)

    empty = client.post("/calibrate/preview", data=form(points=""), headers=HX)
    assert empty.status_code == 200 and 'id="preview-empty"' in empty.text
    assert stored_rows(app) == before


def test_preview_says_what_is_still_needed_before_saving(client) -> None:
    answer = client.post("/calibrate/preview", data=form(operator=" "), headers=HX)
    assert answer.status_code == 200 and 'id="preview-curve"' in answer.text
    assert "Before saving:" in answer.text and "give the operator" in answer.text


def test_save_redirects_to_the_unit_and_stores_exactly_the_points(app, client) -> None:
    angles = [*ANGLES, 90.0]  # a repeat at 90 deg
    readings = [*READINGS, 345.0]
    today = datetime.now(UTC).replace(second=0, microsecond=0)
    with app.state.sessionmaker() as s:
        unit = s.scalar(sa.select(Unit).where(Unit.serial == FLEET.pot))
        assert unit is not None
        sessions_before, due_before = len(unit.sessions), unit.due_on

    answer = client.post(
        "/calibrate",
        data=form(
            points=pasted(angles, readings),
            kind="as_found",
            ambient="21 °C",
            performed_at=f"{today:%Y-%m-%dT%H:%M}",
        ),
        follow_redirects=False,
    )
    assert answer.status_code == 303
    found = re.fullmatch(rf"/units/{FLEET.pot}\?saved=(\d+)", answer.headers["location"])
    assert found, answer.headers["location"]
    saved_id = int(found.group(1))

    with app.state.sessionmaker() as s:
        record = s.get(CalibrationSession, saved_id)
        assert record is not None and record.unit.serial == FLEET.pot
        assert [(p.reference_value, p.reading) for p in record.points] == list(
            zip(angles, readings, strict=True)
        )
        assert [p.repeat_index for p in record.points][-1] == 1
        assert not any(p.excluded for p in record.points)
        assert (record.operator, record.reference, record.kind.value, record.ambient) == (
            TECHNICIAN[0],
            "dividing head DH-1",
            "as_found",
            "21 °C",
        )
        assert record.reference_expanded_u == 0.1 and record.recorded_by == TECHNICIAN[0]
        assert len(record.unit.sessions) == sessions_before + 1
        assert record.performed_at == today
        # the type's flags were recomputed: the stored due date follows the new calibration
        fresh = unit_due(record.unit)
        assert fresh is not None and fresh.due != due_before
        assert (record.unit.due_on, record.unit.due_basis) == (fresh.due, fresh.basis)
    unit_page = client.get(answer.headers["location"])
    assert unit_page.status_code == 200 and 'class="notice"' in unit_page.text


def test_save_with_a_field_to_fix_stores_nothing(app, client) -> None:
    before = stored_rows(app)
    answer = client.post("/calibrate", data=form(reference=""), follow_redirects=False)
    assert answer.status_code == 422
    assert "Not saved." in answer.text and "name the reference instrument" in answer.text
    assert re.search(r'<input id="reference"[^>]*aria-invalid="true"', answer.text)
    assert 'id="preview-curve"' in answer.text  # the points still previewed
    none = client.post("/calibrate", data=form(points=""), follow_redirects=False)
    assert none.status_code == 422 and "no points" in none.text
    assert stored_rows(app) == before


def test_a_viewer_cannot_calibrate_or_receive(app, viewer) -> None:
    before = stored_rows(app)
    assert viewer.get("/calibrate").status_code == 403
    assert viewer.get(f"/calibrate?unit={FLEET.pot}").status_code == 403
    assert viewer.post("/calibrate/preview", data=form(), headers=HX).status_code == 403
    assert viewer.post("/calibrate", data=form(), follow_redirects=False).status_code == 403
    assert viewer.get("/receive").status_code == 403
    received = viewer.post("/receive", data={"sensor_type": POT_TYPE, "serials": "V-1"})
    assert received.status_code == 403
    assert stored_rows(app) == before
    assert 'href="/calibrate"' not in viewer.get("/").text  # no nav link for a viewer


def test_pick_a_unit_by_serial_or_get_told_it_is_unknown(client) -> None:
    picker = client.get("/calibrate")
    assert picker.status_code == 200
    assert 'name="unit"' in picker.text and 'href="/receive"' in picker.text
    assert 'href="/calibrate"' in client.get("/").text  # the nav link
    # never calibrated: listed as waiting, each a link to its form
    assert f'href="/calibrate?unit={FLEET.fresh}"' in picker.text
    assert f'href="/calibrate?unit={FLEET.pot}"' not in picker.text

    unknown = client.get("/calibrate?unit=NOPE-9")
    assert unknown.status_code == 422
    assert "NOPE-9" in unknown.text and "receive the unit first" in unknown.text
    assert 'value="NOPE-9"' in unknown.text  # the box keeps what was scanned

    scanned = client.get(f"/calibrate?unit={FLEET.pot.lower()}%20")  # any case, a trailing blank
    assert scanned.status_code == 200
    assert f'name="unit" value="{FLEET.pot}"' in scanned.text
    assert f'value="{TECHNICIAN[0]}"' in scanned.text  # the operator: who is signed in
    assert 'value="dividing head DH-1"' in scanned.text  # the reference used last time

    posted = client.post("/calibrate/preview", data=form(unit="NOPE-9"), headers=HX)
    assert posted.status_code == 422


def csv_of(rows: list[tuple[float, float, str, str]]) -> bytes:
    lines = ["reference_value,reading,excluded,exclude_reason"]
    lines += [f"{v:g},{r:g},{flag},{why}" for v, r, flag, why in rows]
    return ("\n".join(lines) + "\n").encode()


def test_points_from_a_csv_file(app, client) -> None:
    rows = [(a, r, "", "") for a, r in zip(ANGLES, READINGS, strict=True)]
    rows[4] = (120.0, 470.0, "yes", "pointer slipped on the dividing head")
    upload = {"file": ("bench-run.csv", csv_of(rows), "text/csv")}
    before = stored_rows(app)

    preview = client.post(
        "/calibrate/preview", data=form(points="", family="line"), files=upload, headers=HX
    )
    assert preview.status_code == 200
    html = preview.text
    assert "pointer slipped on the dividing head" in html and 'id="preview-excluded"' in html
    assert "from bench-run.csv" in html
    used = [i for i in range(len(ANGLES)) if i != 4]
    c0, c1 = independent_line([ANGLES[i] for i in used], [READINGS[i] for i in used])
    assert data_value(html, 'data-param="c1"') == pytest.approx(c1, rel=1e-8)
    assert data_value(html, 'data-param="c0"') == pytest.approx(c0, rel=1e-8, abs=1e-9)
    assert data_value(html, 'id="preview-dof"') == len(used) - 2
    assert stored_rows(app) == before

    both = client.post("/calibrate/preview", data=form(), files=upload, headers=HX)
    assert both.status_code == 422 and "clear the pasted points" in both.text
    broken = {"file": ("x.csv", b"angle,counts\n1,2\n", "text/csv")}
    wrong = client.post("/calibrate/preview", data=form(points=""), files=broken, headers=HX)
    assert wrong.status_code == 422 and "reference_value" in wrong.text

    # without JavaScript the page comes back with the file's text kept for the save
    page = client.post("/calibrate/preview", data=form(points=""), files=upload)
    assert page.status_code == 200 and 'id="kept-file"' in page.text
    kept = unescape(
        re.search(r'<textarea name="csv_text" hidden>(.*?)</textarea>', page.text, re.S)[1]
    )
    saved = client.post(
        "/calibrate",
        data=form(points="", csv_text=kept, csv_name="bench-run.csv"),
        follow_redirects=False,
    )
    assert saved.status_code == 303
    saved_id = int(saved.headers["location"].rsplit("=", 1)[1])
    with app.state.sessionmaker() as s:
        record = s.get(CalibrationSession, saved_id)
        assert record is not None
        assert [
            (p.reference_value, p.reading, p.excluded, p.exclude_reason) for p in record.points
        ] == [(v, r, flag == "yes", why or None) for v, r, flag, why in rows]

    direct = client.post("/calibrate", data=form(points=""), files=upload, follow_redirects=False)
    assert direct.status_code == 303 and direct.headers["location"].startswith(
        f"/units/{FLEET.pot}?saved="
    )


# -- /receive -----------------------------------------------------------------------------------
def serials_in(app: Any, prefix: str) -> list[str]:
    with app.state.sessionmaker() as s:
        return sorted(s.scalars(sa.select(Unit.serial).where(Unit.serial.like(f"{prefix}%"))))


def test_receive_a_numbered_batch_and_list_it_with_calibrate_links(app, client) -> None:
    audit_before = count(app, AuditEntry)
    answer = client.post(
        "/receive",
        data={
            "sensor_type": POT_TYPE,
            "received_on": "2026-01-12",
            "prefix": "POT-2612-",
            "start": "1",
            "count": "10",
            "notes": "box 7",
        },
        follow_redirects=False,
    )
    assert answer.status_code == 303 and answer.headers["location"].startswith("/receive?")
    expected = [
        "POT-2612-01", "POT-2612-02", "POT-2612-03", "POT-2612-04", "POT-2612-05",
        "POT-2612-06", "POT-2612-07", "POT-2612-08", "POT-2612-09", "POT-2612-10",
    ]  # fmt: skip
    assert serials_in(app, "POT-2612-") == expected
    with app.state.sessionmaker() as s:
        units = s.scalars(sa.select(Unit).where(Unit.serial.in_(expected))).all()
        assert {
            (u.sensor_type.name, str(u.received_on), u.notes, u.status.value) for u in units
        } == {(POT_TYPE, "2026-01-12", "box 7", "in_stock")}
    assert count(app, AuditEntry) == audit_before + 10  # one "unit.registered" each

    listing = client.get(answer.headers["location"])
    assert listing.status_code == 200 and "Received 10 units" in listing.text
    links = re.findall(r'class="calibrate-link" href="/calibrate\?unit=([^"]+)"', listing.text)
    assert links == expected
    assert f'<option value="{POT_TYPE}" selected>' in listing.text  # ready for the next box
    follow = client.get(f"/calibrate?unit={links[0]}")
    assert follow.status_code == 200 and f'name="unit" value="{expected[0]}"' in follow.text

    wide = client.post(
        "/receive",
        data={"sensor_type": POT_TYPE, "prefix": "W-", "start": "98", "count": "3"},
        follow_redirects=False,
    )
    assert wide.status_code == 303
    assert serials_in(app, "W-") == ["W-098", "W-099", "W-100"]


def test_receive_a_scanned_list(app, client) -> None:
    answer = client.post(
        "/receive",
        data={"sensor_type": POT_TYPE, "serials": "LST-A\r\nLST-B\n\n  LST-C  \n"},
        follow_redirects=False,
    )
    assert answer.status_code == 303
    assert serials_in(app, "LST-") == ["LST-A", "LST-B", "LST-C"]


def test_receive_is_all_or_nothing(app, client) -> None:
    units_before = count(app, Unit)
    audit_before = count(app, AuditEntry)
    listed = f"NEW-1\n{FLEET.pot}\nNEW-2\nnew-1\n"
    answer = client.post(
        "/receive", data={"sensor_type": POT_TYPE, "serials": listed}, follow_redirects=False
    )
    assert answer.status_code == 422
    text = unescape(answer.text)
    assert "Nothing registered." in text
    assert f"exists already: {FLEET.pot}" in text and "repeated in the list: NEW-1" in text
    assert re.search(r'<textarea id="serials"[^>]*aria-invalid="true"', answer.text)
    assert listed.strip() in text  # the list comes back to fix
    assert count(app, Unit) == units_before and count(app, AuditEntry) == audit_before
    assert serials_in(app, "NEW-") == []

    clash = client.post(
        "/receive",
        data={"sensor_type": POT_TYPE, "prefix": "POT-000", "start": "0", "count": "3"},
    )  # POT-00000 .. POT-00002: none stored, so this one goes through
    assert clash.status_code == 200  # followed the redirect to the listing
    again = client.post(
        "/receive", data={"sensor_type": POT_TYPE, "prefix": "POT-000", "start": "1", "count": "3"}
    )
    assert again.status_code == 422 and "POT-00001, POT-00002" in again.text
    assert count(app, Unit) == units_before + 3


@pytest.mark.parametrize(
    ("data", "words"),
    [
        ({"serials": "A-1"}, "pick the type"),
        ({"sensor_type": POT_TYPE}, "give the serials"),
        ({"sensor_type": POT_TYPE, "serials": "A-1", "prefix": "A-", "count": "2"}, "not both"),
        ({"sensor_type": POT_TYPE, "prefix": "A-", "count": "ten"}, "not a whole number"),
        ({"sensor_type": POT_TYPE, "prefix": "A-", "count": "0"}, "the count must be"),
        ({"sensor_type": POT_TYPE, "count": "3"}, "give the prefix"),
        ({"sensor_type": POT_TYPE, "serials": "A-1", "received_on": "12/01"}, "not a date"),
        ({"sensor_type": POT_TYPE, "serials": "X" * 70}, "at most 64 characters"),
    ],
)
def test_receive_form_mistakes_answer_422(app, client, data: dict[str, str], words: str) -> None:
    before = count(app, Unit)
    answer = client.post("/receive", data=data, follow_redirects=False)
    assert answer.status_code == 422 and words in unescape(answer.text).lower()
    assert count(app, Unit) == before
