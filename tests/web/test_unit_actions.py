"""Unit page actions without a browser: voiding a calibration with a reason, moving a unit in and
out of quarantine or service, and the record of changes that both leave."""

from __future__ import annotations

import re
from html import unescape
from pathlib import Path

import pytest

from server.fleet.pages import unit_url
from tests.web.seed import TECHNICIAN, Fleet, seed

FLEET = Fleet()


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("actions") / "sensorledger.db"
    seed(f"sqlite:///{path}")
    return path


def session_ids(html: str) -> list[int]:
    """The calibration ids of the history table, newest first (from their report links)."""
    return [int(x) for x in re.findall(r'/calibrations/(\d+)/report"', html)]


def text(html: str) -> str:
    return re.sub(r"\s+", " ", unescape(re.sub(r"<[^>]+>", " ", html)))


def test_voiding_the_newest_calibration(client) -> None:
    url = unit_url(FLEET.calibrated)
    page = client.get(url).text
    newest, older = session_ids(page)[:2]
    assert "current" in re.findall(r'<tr class="([^"]*)">\s*<td class="date">', page)[0]

    empty = client.post(f"{url}/calibrations/{newest}/void", data={"reason": " "})
    assert empty.status_code == 422
    assert "a reason is needed" in empty.text
    assert re.search(rf'id="void-reason-{newest}"[^>]*aria-invalid="true"', empty.text)

    done = client.post(
        f"{url}/calibrations/{newest}/void",
        data={"reason": "reference target slipped"},
        follow_redirects=False,
    )
    assert done.status_code == 303 and done.headers["location"] == f"{url}#history"
    after = client.get(url).text
    words = text(after)
    assert f"by {TECHNICIAN[0]}: reference target slipped" in words
    # the older calibration is current again; the voided one keeps its row, struck out
    rows = re.findall(r'<tr class="([^"]*)">\s*<td class="date">', after)
    assert rows[0].startswith("voided") and "current" in rows[1]
    assert session_ids(after)[:2] == [newest, older]
    assert "calibration of" in words and "voided: reference target slipped" in words

    twice = client.post(f"{url}/calibrations/{newest}/void", data={"reason": "again"})
    assert twice.status_code == 422 and "voided already" in twice.text
    assert client.post(f"{url}/calibrations/999999/void", data={"reason": "x"}).status_code == 404


def test_status_moves(client) -> None:
    url = unit_url(FLEET.pot)
    page = client.get(url).text
    assert 'name="status" value="quarantined"' in page
    moved = client.post(f"{url}/status", data={"status": "quarantined"}, follow_redirects=False)
    assert moved.status_code == 303
    after = client.get(url).text
    assert 'class="status status-quarantined"' in after
    assert 'name="status" value="in_stock"' in after
    assert "status in_stock -&gt; quarantined" in after or "status in_stock -> quarantined" in after

    installed = unit_url(FLEET.spare)
    assert "record its removal under Installations" in client.get(installed).text
    refused = client.post(f"{installed}/status", data={"status": "retired"})
    assert refused.status_code == 422 and "record its removal" in refused.text
    bogus = client.post(f"{url}/status", data={"status": "installed"})
    assert bogus.status_code == 422


def test_viewers_see_no_actions_and_cannot_post(viewer) -> None:
    url = unit_url(FLEET.calibrated)
    page = viewer.get(url).text
    assert "void…" not in page and 'action="' + url + '/status"' not in page
    assert "Record of changes" in page
    newest = session_ids(page)[0]
    r = viewer.post(
        f"{url}/calibrations/{newest}/void", data={"reason": "x"}, follow_redirects=False
    )
    assert r.status_code == 403
    r = viewer.post(f"{url}/status", data={"status": "retired"}, follow_redirects=False)
    assert r.status_code == 403


def test_an_expired_sign_in_sends_the_whole_page_to_sign_in(app) -> None:
    """An htmx request without a sign-in must not swap the sign-in page into a fragment: it gets
    HX-Redirect to the sign-in, coming back to the page the user was on."""
    from fastapi.testclient import TestClient

    with TestClient(app) as anonymous:
        plain = anonymous.get("/units/IR-0001", follow_redirects=False)
        assert plain.status_code == 303
        assert plain.headers["location"] == "/signin?next=/units/IR-0001"
        partial = anonymous.get(
            "/?q=IR",
            headers={
                "HX-Request": "true",
                "HX-Current-URL": "http://testserver/units/IR-0001?reading=500",
            },
            follow_redirects=False,
        )
        assert partial.status_code == 200 and partial.text == ""
        assert partial.headers["HX-Redirect"] == "/signin?next=/units/IR-0001%3Freading%3D500"
        back = anonymous.get(partial.headers["HX-Redirect"])
        assert 'name="next" value="/units/IR-0001?reading=500"' in back.text
