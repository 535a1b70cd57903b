"""Pages without a browser: sign-in, page-or-block, the scanner's jump, the form, static files."""

from __future__ import annotations

import json
import re
from collections.abc import Iterator
from datetime import UTC, datetime
from html import unescape
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select, update
from sqlalchemy.orm import selectinload

from server.calibrations.models import CalibrationSession, FitRecord
from server.calibrations.pages import parse_points
from server.errors import Invalid
from server.fleet.models import Unit
from tests.web.seed import Fleet, ir_readings, paste_text, seed

FLEET = Fleet()


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The seeded fleet, made once; each test works on its own copy of the file."""
    path = tmp_path_factory.mktemp("seeded") / "sensorledger.db"
    seed(f"sqlite:///{path}")
    return path


@pytest.fixture
def anonymous(app) -> Iterator[TestClient]:
    with TestClient(app) as client:
        yield client


def sessions_of(app, serial: str) -> list[CalibrationSession]:
    with app.state.sessionmaker() as session:
        return list(
            session.scalars(
                select(CalibrationSession)
                .join(Unit)
                .where(Unit.serial == serial)
                .options(selectinload(CalibrationSession.points))
            )
        )


def serials(html: str) -> list[str]:
    return re.findall(r'<td class="serial"><a href="[^"]+">([^<]+)</a>', html)


def form_data(**changes: str) -> dict[str, str]:
    data = {
        "performed_at": "2026-03-14T09:30",
        "operator": "tess",
        "reference": "distance jig DJ-2",
        "kind": "incoming",
        "family": "",
        "ambient": "",
        "notes": "",
        "points": paste_text(ir_readings(201_000, 29, 15, seed=18)),
    }
    return {**data, **changes}


# ---- signing in ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "path", ["/", "/units/IR-0001", "/find?serial=IR-0001", "/units/NO-SUCH-UNIT"]
)
def test_pages_redirect_to_sign_in(anonymous: TestClient, path: str) -> None:
    answer = anonymous.get(path, follow_redirects=False)
    assert answer.status_code == 303
    assert answer.headers["location"].startswith("/signin?next=/")


def test_posting_a_calibration_needs_sign_in(anonymous: TestClient) -> None:
    answer = anonymous.post(
        f"/units/{FLEET.fresh}/calibrations", data=form_data(), follow_redirects=False
    )
    assert answer.status_code == 303
    assert answer.headers["location"].startswith("/signin")


def test_sign_in_page_and_a_wrong_password(anonymous: TestClient) -> None:
    page = anonymous.get("/signin?next=/units/IR-0001")
    assert page.status_code == 200
    assert 'name="next" value="/units/IR-0001"' in page.text
    wrong = anonymous.post("/signin", data={"name": "tess", "password": "nope", "next": "/"})
    assert wrong.status_code == 401
    assert "wrong user name or password" in wrong.text
    assert 'value="tess"' in wrong.text  # the name typed is kept


def test_viewer_sees_no_form_and_cannot_post(viewer: TestClient, app) -> None:
    page = viewer.get(f"/units/{FLEET.fresh}")
    assert page.status_code == 200
    assert 'id="points"' not in page.text
    assert "needs the technician role" in page.text
    answer = viewer.post(f"/units/{FLEET.fresh}/calibrations", data=form_data())
    assert answer.status_code == 403
    assert sessions_of(app, FLEET.fresh) == []


# ---- the fleet ----------------------------------------------------------------------------------


def test_fleet_page_or_block(client: TestClient) -> None:
    page = client.get("/")
    assert page.status_code == 200
    assert page.text.lstrip().startswith("<!doctype html>")
    assert page.headers["vary"] == "HX-Request"
    assert serials(page.text) == ["IR-0001", "IR-0002", "IR-0003", "IR-0104", "POT-0001"]

    block = client.get("/?q=0104", headers={"HX-Request": "true"})
    assert block.status_code == 200
    assert block.headers["vary"] == "HX-Request"
    assert block.text.lstrip().startswith('<section id="results"')
    assert "<html" not in block.text
    assert serials(block.text) == ["IR-0104"]

    restore = client.get("/", headers={"HX-Request": "true", "HX-History-Restore-Request": "true"})
    assert restore.text.lstrip().startswith("<!doctype html>")


def test_fleet_filters_by_type_status_and_serial(client: TestClient) -> None:
    assert serials(client.get("/?type=Rotary pot 270 deg").text) == ["POT-0001"]
    assert serials(client.get("/?status=installed").text) == ["IR-0104"]
    assert serials(client.get("/?q=ir-000").text) == ["IR-0001", "IR-0002", "IR-0003"]
    empty = client.get("/?q=zzz")
    assert serials(empty.text) == []
    assert "No unit matches a serial containing “zzz”" in empty.text
    assert client.get("/?status=lost").status_code == 422


def test_fleet_pages(client: TestClient) -> None:
    first = client.get("/?per_page=2")
    assert "units 1–2 of 5" in first.text
    assert serials(first.text) == ["IR-0001", "IR-0002"]
    assert 'href="/?page=2&amp;per_page=2"' in first.text
    last = client.get("/?per_page=2&page=3")
    assert "units 5–5 of 5" in last.text
    assert 'rel="next"' not in last.text
    assert 'href="/?page=2&amp;per_page=2" rel="prev"' in last.text
    assert client.get("/?page=0").status_code == 422
    beyond = client.get("/?per_page=2&page=9")
    assert "no units on this page; 5 in all" in beyond.text
    assert 'href="/?page=3&amp;per_page=2" rel="prev"' in beyond.text


def test_fleet_shows_decision_and_overdue(client: TestClient) -> None:
    html = client.get("/").text
    row = html[html.index("IR-0002</a>") : html.index("IR-0003</a>")]
    assert "badge-fail" in row
    assert "overdue" in row


@pytest.mark.parametrize(
    ("query", "location"),
    [
        ("serial=IR-0002", "/units/IR-0002"),
        ("serial=%20ir-0002%20", "/units/IR-0002"),  # a scanner's case and blanks
        ("q=IR-0002", "/units/IR-0002"),  # what the search form sends
        ("serial=IR-00", "/?q=IR-00"),
        ("q=IR-00&type=Rotary+pot+270+deg", "/?q=IR-00&type=Rotary+pot+270+deg"),
        ("serial=", "/"),
    ],
)
def test_find_jumps_to_the_unit_or_back_to_the_list(
    client: TestClient, query: str, location: str
) -> None:
    answer = client.get(f"/find?{query}", follow_redirects=False)
    assert answer.status_code == 303
    assert answer.headers["location"] == location


# ---- a unit -------------------------------------------------------------------------------------


def test_unit_page_shows_constants_plots_and_history(client: TestClient) -> None:
    html = client.get(f"/units/{FLEET.calibrated}").text
    assert "value = k / (r + r0) + v0" in html
    assert re.search(r"<code>r0</code></th><td class=\"num mono\">[\d.]+</td>", html)
    assert "counts</strong>" in html  # valid range in reading units
    figures = [json.loads(unescape(m)) for m in re.findall(r'data-figure="([^"]+)"', html)]
    assert len(figures) == 3  # two calibrations: the drift history is drawn too
    curve, residuals, _drift = figures
    names = [t.get("name") for t in curve["data"]]
    assert {"fitted curve", "95 % prediction band", "points used", "points excluded"} <= set(names)
    assert any(str(n).startswith("earlier: ") for n in names)
    assert curve["layout"]["xaxis"]["title"]["text"] == "reading (counts)"
    assert curve["layout"]["yaxis"]["title"]["text"] == "distance (mm)"
    assert any(
        str(t.get("name")).startswith("tolerance ±(3 + 2 % of value)") for t in residuals["data"]
    )
    assert html.count('<tr class="') >= 2  # two sessions in the history
    assert "fold-back" in html  # the excluded points' reason is shown
    # closest to its limit as the share of the tolerance used, in %
    assert re.search(
        r'Closest to its limit</dt><dd><span class="mono">[\d.e+]+ % of tolerance used', html
    )


def test_unit_without_calibration(client: TestClient) -> None:
    html = client.get(f"/units/{FLEET.fresh}").text
    assert "Not calibrated yet" in html
    assert "data-figure" not in html
    assert "plotly.min.js" not in html  # 4.6 MB not loaded for nothing
    assert 'value="tess"' in html  # the operator defaults to who is signed in
    assert '<option value="incoming" selected>' in html


def test_unknown_serial_is_a_404_page(client: TestClient) -> None:
    answer = client.get("/units/NO-SUCH-UNIT")
    assert answer.status_code == 404
    assert answer.headers["content-type"].startswith("text/html")
    assert "NO-SUCH-UNIT" in answer.text
    assert "not found" in answer.text
    assert 'action="/find"' in answer.text  # scan again from there


def test_unknown_page_renders_without_a_user(anonymous: TestClient) -> None:
    answer = anonymous.get("/no/such/page")
    assert answer.status_code == 404
    assert "sensorledger" in answer.text
    assert "Sign out" not in answer.text


# ---- adding a calibration -----------------------------------------------------------------------


def test_add_calibration_without_javascript(client: TestClient, app) -> None:
    answer = client.post(
        f"/units/{FLEET.fresh}/calibrations", data=form_data(), follow_redirects=False
    )
    assert answer.status_code == 303
    (stored,) = sessions_of(app, FLEET.fresh)
    assert answer.headers["location"] == f"/units/{FLEET.fresh}?saved={stored.id}"
    # datetime-local has no zone: it is read as UTC
    assert stored.performed_at == datetime(2026, 3, 14, 9, 30, tzinfo=UTC)
    assert stored.recorded_by == "tess"
    assert len(stored.points) == 16
    page = client.get(answer.headers["location"])
    assert "Calibration of 2026-03-14 09:30 UTC saved" in page.text


def test_add_calibration_with_htmx_redirects_by_header(client: TestClient, app) -> None:
    answer = client.post(
        f"/units/{FLEET.fresh}/calibrations",
        data=form_data(),
        headers={"HX-Request": "true"},
        follow_redirects=False,
    )
    assert answer.status_code == 200
    assert re.fullmatch(rf"/units/{FLEET.fresh}\?saved=\d+", answer.headers["hx-redirect"])
    assert len(sessions_of(app, FLEET.fresh)) == 1


def test_bad_paste_without_javascript_is_a_422_page(client: TestClient, app) -> None:
    pasted = "100, 2709\n150, 1505\n\n200, 1051, 7\n"
    answer = client.post(
        f"/units/{FLEET.fresh}/calibrations", data=form_data(points=pasted, reference="jig 7")
    )
    assert answer.status_code == 422
    assert "<!doctype html>" in answer.text
    assert "line 4: expected two numbers" in answer.text
    assert "100, 2709\n150, 1505\n\n200, 1051, 7\n</textarea>" in answer.text
    assert 'value="jig 7"' in answer.text
    assert sessions_of(app, FLEET.fresh) == []


def test_bad_paste_with_htmx_is_the_form_block(client: TestClient, app) -> None:
    answer = client.post(
        f"/units/{FLEET.fresh}/calibrations",
        data=form_data(points="1, 2"),
        headers={"HX-Request": "true"},
    )
    assert answer.status_code == 422
    assert answer.text.lstrip().startswith('<section class="card" id="calibrate"')
    assert "<html" not in answer.text
    assert "paste at least two points" in answer.text
    assert sessions_of(app, FLEET.fresh) == []


@pytest.mark.parametrize(
    ("changes", "message", "marked"),
    [
        ({"performed_at": ""}, "give the date and time", "performed_at"),
        ({"operator": "  "}, "give the operator", "operator"),
        ({"reference": ""}, "name the reference", "reference"),
        ({"kind": "yearly"}, "unknown kind", "kind"),
        ({"family": "line"}, "are fitted with inverse_offset; not &#39;line&#39;", None),
        ({"points": "100, 2709\n150, 1505\n200, 1051"}, "cannot fit inverse_offset", "points"),
    ],
)
def test_form_errors_name_what_to_fix(
    client: TestClient, app, changes: dict[str, str], message: str, marked: str | None
) -> None:
    answer = client.post(f"/units/{FLEET.fresh}/calibrations", data=form_data(**changes))
    assert answer.status_code == 422
    assert message in answer.text
    if marked:  # the field at fault is marked (the family is hidden: this type has one)
        assert re.search(rf'id="{marked}"[^>]*aria-invalid="true"', answer.text)
    assert sessions_of(app, FLEET.fresh) == []


def test_unknown_unit_calibration_is_404(client: TestClient) -> None:
    assert client.post("/units/NOPE/calibrations", data=form_data()).status_code == 404


# ---- parsing pasted points ----------------------------------------------------------------------


def test_parse_points_accepts_the_usual_separators_and_a_header() -> None:
    text = "reference_value;reading\n# a comment\n10, 4000\n20\t3000\n30;2000\n 40   1e3 \n\n"
    points = parse_points(text)
    assert [(p.reference_value, p.reading) for p in points] == [
        (10, 4000),
        (20, 3000),
        (30, 2000),
        (40, 1000),
    ]
    spreadsheet = "distance (mm)\treading (counts)\n10\t4000\n20\t3000"
    assert len(parse_points(spreadsheet)) == 2


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("10, 4000\n20, x", "line 2: “x” is not a number"),
        ("10, 4000\nreference, reading\n20, 3000", "line 2: “reference” is not a number"),
        ("10, 4000\n20, nan", "line 2: “nan” is not a finite number"),
        ("nan, 4000\n20, 3000", "line 1: “nan” is not a finite number"),
        ("10, 4000\n20,5, 3000", "line 2: expected two numbers"),
        ("10, 4000\n20,5; 3000", "use a point as the decimal mark"),
        ("10", "line 1: expected two numbers"),
        ("", "found 0"),
    ],
)
def test_parse_points_names_the_line_at_fault(text: str, message: str) -> None:
    with pytest.raises(Invalid) as caught:
        parse_points(text)
    assert message in caught.value.message
    assert caught.value.field == "points"


# ---- static files and the page shell ------------------------------------------------------------


@pytest.mark.parametrize(
    ("path", "kind"),
    [
        ("/static/vendor/plotly.min.js", "javascript"),
        ("/static/vendor/htmx-2.0.11.min.js", "javascript"),
        ("/static/js/app.js", "javascript"),
        ("/static/css/app.css", "text/css"),
    ],
)
def test_static_files_are_served(anonymous: TestClient, path: str, kind: str) -> None:
    answer = anonymous.get(path)
    assert answer.status_code == 200
    assert kind in answer.headers["content-type"]
    assert len(answer.content) > 1000


def test_htmx_swaps_422_and_nothing_leaves_the_machine(client: TestClient) -> None:
    html = client.get(f"/units/{FLEET.calibrated}").text
    config = json.loads(
        unescape(re.search(r'name="htmx-config" content=\'([^\']+)\'', html).group(1))
    )
    codes = [rule["code"] for rule in config["responseHandling"]]
    assert codes.index("422") < codes.index("[45]..")
    assert config["responseHandling"][codes.index("422")]["swap"] is True
    for page in (html, client.get("/").text, client.get("/signin").text):
        assert not re.search(r'(src|href)="(https?:)?//', page)
    assert '<script src="/static/vendor/htmx-2.0.11.min.js"' in html
    assert '<script src="/static/vendor/plotly.min.js"' in html


def test_caution_is_on_every_page(client: TestClient, anonymous: TestClient) -> None:
    for page in (
        client.get("/").text,
        anonymous.get("/signin").text,
        client.get("/units/NOPE").text,
    ):
        assert "do not on their own make a calibration accredited or" in page


# ---- model choice, fit checks, uncertainty budget -----------------------------------------------


def test_unit_page_shows_the_model_choice(client: TestClient) -> None:
    html = client.get(f"/units/{FLEET.pot}").text
    section = html[html.index('id="model-choice"') :]
    section = section[: section.index("</section>")]
    rows = re.findall(r"<tr class=\"([^\"]*)\">\s*<th scope=\"row\"><code>([^<]+)</code>", section)
    assert [label for _, label in rows] == ["line", "polynomial(degree=2)"]
    assert "in-use" in rows[0][0]
    assert "recommended</span>" in section.split("polynomial(degree=2)")[0]
    assert "the fewest parameters (2)" in section  # the ranking's reason
    assert "In use: <code>line</code>, the ranking&#39;s recommendation." in section
    for word in ("AICc", "ΔAICc", "BIC", "monotone", "parameters"):
        assert f">{word}</th>" in section


def test_suspect_points_are_marked_in_the_table_and_the_plot(client: TestClient) -> None:
    html = client.get(f"/units/{FLEET.failing}").text
    # the seeded failing unit has one reading 100 counts off at 150 mm (point 6)
    assert "1 suspect point</strong>" in html
    assert re.search(r"<li><strong>#6</strong> \(reference 150 mm,\s+reading \d+ counts\): "
                     r"studentised residual -\d+\.\d\d is beyond", html)  # fmt: skip
    row = re.search(r'<tr class="outside">\s*<td>6</td>.*?</tr>', html, re.S)
    assert row and "suspect</strong>: studentised residual" in row.group(0)
    assert '<details class="card points" open>' in html  # opened so the suspect is seen
    figures = [json.loads(unescape(m)) for m in re.findall(r'data-figure="([^"]+)"', html)]
    [suspect] = [t for t in figures[1]["data"] if t.get("name") == "suspect point (still used)"]
    assert suspect["text"] == ["#6"] and "studentised residual" in suspect["customdata"][0]
    assert "Lack-of-fit test: needs reference values measured more than once" in html


def test_budget_at_mid_range_then_at_a_typed_reading(client: TestClient) -> None:
    html = client.get(f"/units/{FLEET.calibrated}").text
    assert 'id="budget-reading" name="reading"' in html
    assert re.search(r"Reading <strong class=\"mono\">1636\.5 counts</strong>", html)
    for source in ("calibration curve", "repeatability of a new reading",
                   "reference standard (U = 0.3 mm, k = 2)", "reading resolution"):  # fmt: skip
        assert f'<th scope="row">{source}' in html
    assert "expanded uncertainty U = k u<sub>c</sub>" in html

    # without JavaScript: the whole page, with the budget at that reading
    page = client.get(f"/units/{FLEET.calibrated}?reading=500")
    assert page.status_code == 200 and "<!doctype html>" in page.text
    assert 'Reading <strong class="mono">500 counts</strong>' in page.text
    assert 'value="500"' in page.text
    # htmx: the budget block alone
    block = client.get(f"/units/{FLEET.calibrated}?reading=500", headers={"HX-Request": "true"})
    assert block.status_code == 200 and block.headers["vary"] == "HX-Request"
    assert block.text.lstrip().startswith('<section class="card" id="budget"')
    assert "<html" not in block.text and 'Reading <strong class="mono">500 counts' in block.text


@pytest.mark.parametrize(
    ("reading", "message"),
    [("99999", "outside the valid range 225 to 3048 counts"), ("abc", "“abc” is not a number")],
)
def test_a_reading_that_cannot_be_used_is_a_422_with_the_reason(
    client: TestClient, reading: str, message: str
) -> None:
    page = client.get(f"/units/{FLEET.calibrated}", params={"reading": reading})
    assert page.status_code == 422 and "<!doctype html>" in page.text
    assert (
        message in page.text and 'aria-invalid="true" aria-describedby="budget-error"' in page.text
    )
    block = client.get(
        f"/units/{FLEET.calibrated}", params={"reading": reading}, headers={"HX-Request": "true"}
    )
    assert block.status_code == 422
    assert block.text.lstrip().startswith('<section class="card" id="budget"')
    assert message in block.text


def test_the_form_records_the_reference_standard(client: TestClient, app) -> None:
    form = client.get(f"/units/{FLEET.calibrated}").text
    # U and k of the last session are offered again, with the reference
    assert re.search(r'id="reference_expanded_u" name="reference_expanded_u" value="0.3"', form)
    answer = client.post(
        f"/units/{FLEET.fresh}/calibrations",
        data=form_data(
            reference_expanded_u="0.4", reference_k="2", extra_u="0.1", extra_label="card tilt"
        ),
        follow_redirects=False,
    )
    assert answer.status_code == 303, answer.text
    (stored,) = sessions_of(app, FLEET.fresh)
    assert (stored.reference_expanded_u, stored.reference_k) == (0.4, 2.0)
    assert (stored.extra_u, stored.extra_label) == (0.1, "card tilt")
    page = client.get(answer.headers["location"]).text
    assert "(U = 0.4 mm, k = 2)" in page
    assert '<th scope="row">card tilt</th>' in page


@pytest.mark.parametrize(
    ("changes", "message", "marked"),
    [
        ({"reference_expanded_u": "0,3"}, "reference U: “0,3” is not a number",
         "reference_expanded_u"),
        ({"reference_expanded_u": "-1"}, "reference U: Input should be greater than 0",
         "reference_expanded_u"),
        ({"reference_k": "0"}, "coverage factor k: Input should be greater than 0", "reference_k"),
        ({"extra_u": "0.2"}, "what the extra uncertainty is: needed with an extra", "extra_label"),
        ({"extra_label": "tilt"}, "what the extra uncertainty is: given without a value",
         "extra_label"),
    ],
)  # fmt: skip
def test_type_b_form_errors_name_the_field(
    client: TestClient, app, changes: dict[str, str], message: str, marked: str
) -> None:
    answer = client.post(f"/units/{FLEET.fresh}/calibrations", data=form_data(**changes))
    assert answer.status_code == 422
    assert message in answer.text
    assert re.search(rf'id="{marked}"[^>]*aria-invalid="true"', answer.text)
    assert sessions_of(app, FLEET.fresh) == []


def test_a_calibration_stored_before_rankings_shows_what_it_can(client: TestClient, app) -> None:
    with app.state.sessionmaker() as session:  # as revision 0002 leaves older fits
        session.execute(update(FitRecord).values(ranking=None, diagnostics=None))
        session.commit()
    page = client.get(f"/units/{FLEET.failing}")
    assert page.status_code == 200
    assert "stored before model ranking was kept; only inverse_offset was fitted" in page.text
    assert "1 suspect point</strong>" in page.text  # diagnostics computed from the stored fit


# ---- exports and the printable report -----------------------------------------------------------

DOWNLOADS = [
    ("table.csv", "text/csv", "-table.csv"),
    ("table.json", "application/json", "-table.json"),
    ("firmware.h", "text/x-c", ".h"),
]


@pytest.mark.parametrize(
    "path",
    [f"/units/{FLEET.calibrated}/{name}" for name, _, _ in DOWNLOADS]
    + [f"/units/{FLEET.calibrated}/calibrations/1/report"],
)
def test_downloads_and_reports_need_sign_in(anonymous: TestClient, path: str) -> None:
    answer = anonymous.get(path, follow_redirects=False)
    assert answer.status_code == 303
    assert answer.headers["location"] == f"/signin?next={path}"


@pytest.mark.parametrize(("name", "media_type", "suffix"), DOWNLOADS)
def test_downloads_have_their_type_and_file_name(
    viewer: TestClient, name: str, media_type: str, suffix: str
) -> None:
    answer = viewer.get(f"/units/{FLEET.calibrated}/{name}")
    assert answer.status_code == 200, answer.text
    assert answer.headers["content-type"].startswith(media_type)
    disposition = f'attachment; filename="{FLEET.calibrated}{suffix}"'
    assert answer.headers["content-disposition"] == disposition


def test_download_of_an_uncalibrated_unit_is_a_404_page(client: TestClient) -> None:
    answer = client.get(f"/units/{FLEET.fresh}/table.csv")
    assert answer.status_code == 404
    assert "has no current calibration" in unescape(answer.text)


def test_unit_page_offers_downloads_and_reports(client: TestClient, app) -> None:
    page = client.get(f"/units/{FLEET.calibrated}").text
    for name, _, _ in DOWNLOADS:
        assert f'href="/units/{FLEET.calibrated}/{name}"' in page
    ids = [s.id for s in sessions_of(app, FLEET.calibrated)]
    for session_id in ids:
        assert f'href="/units/{FLEET.calibrated}/calibrations/{session_id}/report"' in page
    assert "header-unavailable" not in page


def test_firmware_button_explains_a_non_integer_span(client: TestClient, app) -> None:
    from server.fleet.models import SensorType

    with app.state.sessionmaker() as session:
        session.execute(
            update(SensorType)
            .where(SensorType.name == "Rotary pot 270 deg")
            .values(reading_max=2.2)
        )
        session.commit()
    page = unescape(client.get(f"/units/{FLEET.pot}").text)
    assert f'href="/units/{FLEET.pot}/firmware.h"' not in page
    assert "No firmware header: a firmware header converts integer reading codes" in page
    refused = client.get(f"/units/{FLEET.pot}/firmware.h")
    assert refused.status_code == 422 and "not whole codes" in unescape(refused.text)


def test_report_shows_the_session_and_the_cautions(client: TestClient, app) -> None:
    session_id = max(s.id for s in sessions_of(app, FLEET.calibrated))
    answer = client.get(f"/units/{FLEET.calibrated}/calibrations/{session_id}/report")
    assert answer.status_code == 200
    page = unescape(answer.text)
    for text in (
        FLEET.calibrated,
        "IR rangefinder 10-80 cm",
        "distance jig DJ-2 (cert. 2025-117)",
        "U = 0.3 mm, k = 2",
        "Decision: PASS",
        "Rule.",
        "inverse_offset",
        "Uncertainty budget at mid-range",
        "no: ",  # the two fold-back points are excluded, with their reason
        "do not on their own make a calibration accredited or",
        'data-static="yes"',
    ):
        assert text in page, text
    assert '<footer class="caution">' not in page  # the cautions are in the report itself


def test_report_of_another_units_session_is_404(client: TestClient, app) -> None:
    other = sessions_of(app, FLEET.pot)[0].id
    assert client.get(f"/units/{FLEET.calibrated}/calibrations/{other}/report").status_code == 404
    assert client.get(f"/units/{FLEET.calibrated}/calibrations/9999/report").status_code == 404
    assert client.get(f"/units/{FLEET.pot}/calibrations/{other}/report").status_code == 200
