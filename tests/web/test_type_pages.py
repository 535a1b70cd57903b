"""Sensor type pages: the list, the settings form (admins only; a form to fix on bad input), the
refit job it starts and its progress block, the fleet's flag filter; and one browser test in
which htmx polls a refit to its end."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any
from urllib.parse import quote

import pytest
import sqlalchemy as sa

from server.accounts import service as accounts
from server.accounts.models import Role, User
from server.app import create_app
from server.config import Settings
from server.fleet.models import SensorType
from tests.web.conftest import new_context, open_page, sign_in, signed_in_client
from tests.web.seed import IR_TYPE, POT_TYPE, Fleet, seed

ADMIN = ("ada", "admin-pass-1")
FLEET = Fleet()
TIMEOUT_S = 120  # a hang, not a speed limit


def add_admin(url: str) -> None:
    app = create_app(Settings(database_url=url))
    with app.state.sessionmaker() as session:
        if session.scalar(sa.select(User).where(User.name == ADMIN[0])) is None:
            accounts.create_user(session, ADMIN[0], Role.admin, password=ADMIN[1])
            session.commit()
    app.state.engine.dispose()


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("types") / "sensorledger.db"
    seed(f"sqlite:///{path}")
    add_admin(f"sqlite:///{path}")
    return path


@pytest.fixture
def admin(app) -> Any:
    with signed_in_client(app, *ADMIN) as c:
        yield c


def url(name: str) -> str:
    return f"/types/{quote(name, safe='')}"


def form_of(st: SensorType, **changes: Any) -> dict[str, Any]:
    def text(x: float | None) -> str:
        return "" if x is None else f"{x:g}"

    data = {
        "families": list(st.families),
        "family_options": "",
        "tolerance_abs": text(st.tolerance_abs),
        "tolerance_rel": text(st.tolerance_rel),
        "drift_limit_abs": text(st.drift_limit_abs),
        "interval_days": str(st.interval_days),
        "tur": text(st.tur),
        "noise_in": st.noise_in.value,
        "reading_resolution": text(st.reading_resolution),
    }
    return {**data, **changes}


def the_type(app: Any, name: str) -> SensorType:
    with app.state.sessionmaker() as s:
        found = s.scalar(sa.select(SensorType).where(SensorType.name == name))
        assert found is not None
        return found


def test_types_list_and_a_read_only_type_page(viewer) -> None:
    html = viewer.get("/types").text
    for name in (IR_TYPE, POT_TYPE):
        assert f'href="{url(name)}"' in html
    page = viewer.get(url(POT_TYPE))
    assert page.status_code == 200
    assert "Only an admin changes a type." in page.text
    assert '<form method="post" action="' + url(POT_TYPE) + '"' not in page.text
    assert viewer.get("/types/No%20such").status_code == 404


def test_only_admins_save(client, app) -> None:
    st = the_type(app, POT_TYPE)
    r = client.post(url(POT_TYPE), data=form_of(st, tur="3"), follow_redirects=False)
    assert r.status_code == 403
    assert the_type(app, POT_TYPE).tur == st.tur


def test_a_tolerance_change_starts_a_refit_shown_on_the_page(admin, app) -> None:
    st = the_type(app, IR_TYPE)
    r = admin.post(
        url(IR_TYPE),
        data=form_of(st, tolerance_abs="0.01", tolerance_rel=""),
        follow_redirects=False,
    )
    assert r.status_code == 303, r.text
    found = re.fullmatch(re.escape(url(IR_TYPE)) + r"\?job=(\d+)", r.headers["location"])
    assert found, r.headers["location"]
    job_id = int(found.group(1))
    app.state.jobs.wait(TIMEOUT_S)
    block = admin.get(f"{url(IR_TYPE)}/jobs/{job_id}", headers={"HX-Request": "true"})
    assert block.status_code == 200
    assert block.text.lstrip().startswith('<div class="job job-done')
    assert "refitted" in block.text and "decisions changed" in block.text
    assert "hx-trigger" not in block.text  # finished: no more polling
    assert "<html" not in block.text
    page = admin.get(r.headers["location"]).text
    assert f'id="job-{job_id}"' in page and "tolerance_abs" in page
    assert the_type(app, IR_TYPE).tolerance_abs == pytest.approx(0.01)
    assert the_type(app, IR_TYPE).tolerance_rel is None


def test_a_drift_limit_change_recomputes_without_a_job(admin, app) -> None:
    st = the_type(app, POT_TYPE)
    r = admin.post(url(POT_TYPE), data=form_of(st, drift_limit_abs="0.25"), follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"].endswith("?saved=1")
    assert "Saved." in admin.get(r.headers["location"]).text
    assert the_type(app, POT_TYPE).drift_limit_abs == pytest.approx(0.25)


@pytest.mark.parametrize(
    ("changes", "field", "words"),
    [
        ({"tolerance_abs": "abc"}, "tolerance_abs", "is not a number"),
        ({"family_options": "{degree: 2"}, "family_options", "not JSON"),
        ({"families": []}, "families", "at least one family"),
        ({"interval_days": "1.5"}, "interval_days", "whole number"),
        ({"tolerance_abs": "", "tolerance_rel": ""}, "tolerance_abs", "tolerance"),
        ({"tur": "-1"}, "tur", "greater than 0"),
    ],
)
def test_a_bad_form_is_shown_again_and_nothing_changes(admin, app, changes, field, words) -> None:
    st = the_type(app, POT_TYPE)
    r = admin.post(url(POT_TYPE), data=form_of(st, **changes), follow_redirects=False)
    assert r.status_code == 422
    assert "Not saved." in r.text and words in r.text
    if field != "families":
        assert re.search(rf'id="{field}"[^>]*aria-invalid="true"', r.text)
    for typed in changes.values():
        if isinstance(typed, str) and typed:
            assert f'value="{typed}"' in r.text.replace("&#34;", '"').replace("&quot;", '"')
    after = the_type(app, POT_TYPE)
    assert (after.tolerance_abs, after.interval_days, after.tur) == (
        st.tolerance_abs,
        st.interval_days,
        st.tur,
    )


def test_fleet_filtered_by_open_flags(client) -> None:
    failing = client.get("/?flag=failed_acceptance").text
    assert FLEET.failing in failing and FLEET.calibrated not in failing
    assert 'option value="failed_acceptance" selected' in failing
    anything = client.get("/?flag=any").text
    assert FLEET.failing in anything and FLEET.fresh not in anything
    assert client.get("/?flag=wobbly").status_code == 422


@pytest.mark.browser
def test_refit_progress_is_polled_to_the_end(browser, server, live_db, artifacts) -> None:
    db_url, _ = live_db
    add_admin(db_url)
    context, guard = new_context(browser, server)
    try:
        page = open_page(context, guard)
        page.goto("/signin")
        sign_in(page, *ADMIN)
        page.wait_for_url(f"{server}/")
        page.goto(url(POT_TYPE))
        page.click("text=Refit all calibrations")
        page.wait_for_url(re.compile(r".*\?job=\d+$"))
        # the job block polls every second until the job is done, without a reload
        page.wait_for_selector(".job.job-done", timeout=TIMEOUT_S * 1000)
        text = page.inner_text(".job.job-done")
        assert "refitted" in text and "0 decisions changed" in text
        page.screenshot(path=str(artifacts / "type-refit-done.png"), full_page=True)
        guard.check()
    finally:
        context.close()


NEW_TYPE = {
    "name": "Thermistor 10k",
    "quantity": "temperature",
    "value_unit": "degC",
    "reading_unit": "ohm",
    "reading_min": "100",
    "reading_max": "400000",
    "families": ["steinhart_hart", "beta"],
    "family_options": "",
    "tolerance_abs": "0.2",
    "tolerance_rel": "",
    "drift_limit_abs": "0.1",
    "interval_days": "365",
    "tur": "4",
    "noise_in": "value",
    "reading_resolution": "",
}


def test_an_admin_creates_a_type(admin, app) -> None:
    assert admin.get("/types/new").status_code == 200
    r = admin.post("/types", data=NEW_TYPE, follow_redirects=False)
    assert r.status_code == 303, r.text
    assert r.headers["location"] == url("Thermistor 10k")
    made = the_type(app, "Thermistor 10k")
    assert (made.quantity, made.value_unit, made.reading_unit) == ("temperature", "degC", "ohm")
    assert (made.reading_min, made.reading_max) == (100.0, 400000.0)
    assert made.families == ["steinhart_hart", "beta"] and made.tolerance_abs == 0.2
    assert made.tolerance_rel is None and made.drift_limit_abs == 0.1
    assert "Thermistor 10k" in admin.get("/types").text


@pytest.mark.parametrize(
    ("changes", "field", "words"),
    [
        ({"name": IR_TYPE}, "name", "exists already"),
        ({"reading_max": "50"}, "reading_max", "greater than reading_min"),
        ({"reading_min": "low"}, "reading_min", "not a number"),
        ({"tolerance_abs": ""}, "tolerance_abs", "tolerance"),
        ({"name": ""}, "name", "name"),
        ({"families": ["steinhart_hart", "nope"]}, "families.1", "unknown family"),
    ],
)
def test_a_new_type_that_cannot_be_made_comes_back(admin, app, changes, field, words) -> None:
    r = admin.post("/types", data={**NEW_TYPE, **changes}, follow_redirects=False)
    assert r.status_code == 422
    assert "Not saved." in r.text and words in r.text
    if not field.startswith("famil"):
        assert re.search(rf'id="{field}"[^>]*aria-invalid="true"', r.text)
    assert 'value="temperature"' in r.text  # what was typed is kept
    with app.state.sessionmaker() as s:
        names = set(s.scalars(sa.select(SensorType.name)))
    assert "Thermistor 10k" not in names


def test_only_admins_create_types(client, viewer) -> None:
    assert viewer.get("/types/new").status_code == 403
    assert client.post("/types", data=NEW_TYPE, follow_redirects=False).status_code == 403
    assert 'href="/types/new"' not in viewer.get("/types").text


def test_a_finished_job_block_brings_the_nav_count_up_to_date(admin, app) -> None:
    st = the_type(app, POT_TYPE)
    r = admin.post(url(POT_TYPE), data=form_of(st, tolerance_abs="0.05"), follow_redirects=False)
    job_id = int(r.headers["location"].rsplit("=", 1)[1])
    app.state.jobs.wait(TIMEOUT_S)
    block = admin.get(f"{url(POT_TYPE)}/jobs/{job_id}", headers={"HX-Request": "true"}).text
    found = re.search(
        r'<span id="nav-count" class="nav-count" hx-swap-oob="true"[^>]*>(\d+)<', block
    )
    assert found, block
    page = admin.get("/attention").text  # the count the page itself shows now
    shown = re.search(r'<span id="nav-count" class="nav-count"[^>]*>(\d+)</span>', page)
    assert shown and found.group(1) == shown.group(1)
    assert int(found.group(1)) >= 1  # the tighter tolerance failed some calibrations


def test_unit_and_type_pages_say_when_the_fleet_comparison_is_catching_up(app, viewer):
    from server.fleet.models import Unit
    from server.jobs import service as jobs
    from server.jobs.models import JobKind
    from tests.web.seed import Fleet

    with app.state.sessionmaker() as s:
        unit = s.scalar(sa.select(Unit).where(Unit.serial == Fleet.calibrated))
        assert unit is not None
        st = unit.sensor_type
        name = st.name
    unit_url = f"/units/{Fleet.calibrated}"
    assert "catching up" not in viewer.get(unit_url).text
    assert "catching up" not in viewer.get(url(name)).text
    app.state.jobs.shutdown()  # keep the comparison queued while the pages are read
    with app.state.sessionmaker() as s:
        jobs.enqueue_once(s, JobKind.fleet, jobs.fleet_key(st.id), "test", sensor_type_id=st.id)
        s.commit()
    assert "is catching up" in viewer.get(unit_url).text
    assert "is catching up" in viewer.get(url(name)).text
