"""Flag pages without a browser: "Needs attention", acknowledging without JavaScript, the unit
page's flags and installation form, the fleet's badges."""

from __future__ import annotations

import json
import re
from html import unescape
from pathlib import Path

import pytest

import shared
from server.app import create_app
from server.config import Settings
from server.flags.service import recompute_all
from server.fleet.service import get_unit
from shared.drift import compare
from tests.web.seed import TECHNICIAN, Fleet, seed

FLEET = Fleet()


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The seeded fleet with its flags computed (IR-0002: failed and overdue)."""
    path = tmp_path_factory.mktemp("seeded") / "sensorledger.db"
    url = f"sqlite:///{path}"
    seed(url)
    app = create_app(Settings(database_url=url))
    with app.state.sessionmaker() as session:
        recompute_all(session)
        session.commit()
    app.state.engine.dispose()
    return path


def test_attention_lists_flags_by_kind_with_a_count_in_the_nav(client) -> None:
    page = client.get("/attention")
    assert page.status_code == 200
    html = page.text
    assert 'data-kind="failed_acceptance"' in html and 'data-kind="overdue"' in html
    assert "IR-0002" in html and "days overdue" in html
    assert re.search(r'<span id="nav-count" class="nav-count">\d+</span>', html)
    fleet = client.get("/").text
    assert 'class="flag-abbr flag-failed_acceptance' in fleet and ">FAIL</a>" in fleet
    assert client.get("/attention?show=nope").status_code == 422


def test_acknowledge_without_javascript(client) -> None:
    html = client.get("/attention").text
    flag_id = int(re.search(r'data-kind="overdue".*?id="flag-(\d+)"', html, re.S).group(1))
    url = f"/attention/flags/{flag_id}/acknowledge"
    empty = client.post(url, data={"note": "  "}, follow_redirects=False)
    assert empty.status_code == 422
    assert "a note is needed" in empty.text and 'aria-invalid="true"' in empty.text
    done = client.post(url, data={"note": "on loan, back Monday"}, follow_redirects=False)
    assert done.status_code == 303 and done.headers["location"] == f"/attention#flag-{flag_id}"
    after = client.get("/attention").text
    assert f"Acknowledged</strong> by {TECHNICIAN[0]}" in after
    assert "on loan, back Monday" in after
    again = client.post(url, data={"note": "x"}, headers={"HX-Request": "true"})
    assert again.status_code == 409


def test_acknowledge_with_htmx_swaps_the_card_the_counts_and_the_nav_count(client) -> None:
    html = client.get("/attention").text
    found = re.search(r'data-kind="failed_acceptance".*?id="flag-(\d+)"', html, re.S)
    flag_id = int(found.group(1))
    waiting = int(re.search(r"<strong>(\d+)</strong> action flag", html).group(1))
    url = f"/attention/flags/{flag_id}/acknowledge"
    bad = client.post(url, data={"note": ""}, headers={"HX-Request": "true"})
    assert bad.status_code == 422 and bad.text.lstrip().startswith("<article")
    assert f'id="flag-{flag_id}"' in bad.text and "a note is needed" in bad.text
    assert "hx-swap-oob" not in bad.text  # nothing changed: the counts stay
    ok = client.post(url, data={"note": "sent back"}, headers={"HX-Request": "true"})
    assert ok.status_code == 200 and "<html" not in ok.text
    assert ok.text.lstrip().startswith('<article class="flag-card severity-action acknowledged"')
    assert "sent back" in ok.text
    assert 'id="attention-counts"' in ok.text and 'hx-swap-oob="true"' in ok.text
    assert f"<strong>{waiting - 1}</strong> action flag" in ok.text  # the counts follow
    assert re.search(rf'id="nav-count"[^>]*hx-swap-oob="true"[^>]*>{waiting - 1}<', ok.text)


def test_viewer_sees_flags_but_cannot_acknowledge_or_install(viewer) -> None:
    html = viewer.get("/attention").text
    assert "IR-0002" in html and "Acknowledge with a note" not in html
    flag_id = int(re.search(r'id="flag-(\d+)"', html).group(1))
    answer = viewer.post(f"/attention/flags/{flag_id}/acknowledge", data={"note": "n"})
    assert answer.status_code == 403
    unit = viewer.get(f"/units/{FLEET.pot}").text
    assert 'id="installations"' in unit and 'class="event-form"' not in unit


def test_unit_page_flags_and_installations(client) -> None:
    unit = client.get(f"/units/{FLEET.failing}").text
    assert 'id="flags"' in unit and "Failed acceptance" in unit and "Overdue" in unit
    url = f"/units/{FLEET.pot}/events"
    missing = client.post(url, data={"kind": "installed", "location": "", "at": "2026-01-02T10:00"})
    assert missing.status_code == 422 and "say where the unit is installed" in missing.text
    assert 'id="event-location"' in missing.text
    not_installed = client.post(
        url, data={"kind": "removed", "at": "2026-01-02T10:00"}, headers={"HX-Request": "true"}
    )
    assert not_installed.status_code == 422 and "not installed" in not_installed.text
    assert not_installed.text.lstrip().startswith("<section")
    ok = client.post(
        url,
        data={"kind": "installed", "location": "arm A / elbow", "at": "2026-01-02T10:00"},
        follow_redirects=False,
    )
    assert ok.status_code == 303 and ok.headers["location"].endswith("#installations")
    page = client.get(f"/units/{FLEET.pot}").text
    assert "arm A / elbow" in page and "2026-01-02 10:00 UTC" in page
    assert '<option value="removed" selected>' in page  # next: remove it


def test_unit_page_drift_history_plot_or_sentence(app, client) -> None:
    """Two calibrations: the plot's numbers are shared.drift.compare(first, second) of the stored
    fits, with the ±5 mm drift limit; one calibration: the sentence, no plot."""
    with app.state.sessionmaker() as session:
        unit = get_unit(session, FLEET.calibrated)
        ordered = sorted(unit.sessions, key=lambda s: s.performed_at)
        fits = [shared.Fit.from_dict(s.current_fit.result) for s in ordered]
        dates = [s.performed_at.date().isoformat() for s in ordered]
    assert len(fits) == 2
    expected = compare(fits[0], fits[1], points=201, draws=100)
    html = client.get(f"/units/{FLEET.calibrated}").text
    plot = re.search(r'id="drift-plot"[^>]*data-figure="([^"]+)"', html)
    assert plot is not None
    data = json.loads(unescape(plot.group(1)))["data"]
    (main,) = [t for t in data if t["name"] == "largest deviation from the first curve"]
    assert list(main["x"]) == dates
    assert main["y"] == pytest.approx([0.0, expected.max_deviation], rel=1e-12)
    assert f"{expected.at_reading:.4g} counts" in main["customdata"][1]
    limit = [t for t in data if str(t["name"]).startswith("drift limit ±5 mm")]
    assert sorted(t["y"][0] for t in limit) == [-5.0, 5.0]
    assert html.index('id="flags"') < html.index('id="drift-history"') < html.index('id="history"')

    single = client.get(f"/units/{FLEET.failing}").text
    assert "Drift history needs a second calibration" in single
    assert 'id="drift-plot"' not in single and 'id="flags"' in single
