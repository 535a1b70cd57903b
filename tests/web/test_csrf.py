"""CSRF: a signed-in browser's cookie alone no longer makes a state-changing request. Every form
of the unit page (and every other POST form) refuses a request from another origin and one
without the sign-in's token; the refusal is a 403 page that gives the form back filled in; the
bearer-token API is unchanged."""

from __future__ import annotations

import re
from html import unescape
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from server.accounts import csrf
from server.fleet.pages import unit_url
from tests.web.conftest import signed_in_client
from tests.web.seed import TECHNICIAN, Fleet, seed

FLEET = Fleet()
TEMPLATES = Path(__file__).resolve().parents[2] / "web" / "templates"
OTHER_SITE = "http://testserver:8081"  # the same host, another port: another origin, same site


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("csrf") / "sensorledger.db"
    seed(f"sqlite:///{path}")
    return path


def without_token(client: TestClient) -> TestClient:
    """The signed-in client as a forged request sees it: the cookie, no token."""
    del client.headers[csrf.HEADER]
    return client


def post_forms(html: str) -> list[str]:
    """The actions of the page's POST forms and htmx posts."""
    actions = re.findall(r'<form\b[^>]*method="post"[^>]*action="([^"]+)"', html)
    actions += re.findall(r'hx-post="([^"]+)"', html)
    return sorted({unescape(a) for a in actions})


def test_every_unit_page_form_refuses_a_foreign_origin(client) -> None:
    url = unit_url(FLEET.calibrated)
    page = client.get(url).text
    actions = post_forms(page)
    # sign out, status moves, void (one per calibration), save a calibration, installation event
    assert "/signout" in actions and f"{url}/status" in actions and f"{url}/events" in actions
    assert f"{url}/calibrations" in actions
    assert any(a.endswith("/void") for a in actions)
    for action in actions:
        # the cookie AND the right token, but sent by a page of another origin
        data = {"reason": "x", "status": "quarantined"}
        answer = client.post(
            action, data=data, headers={"Origin": OTHER_SITE}, follow_redirects=False
        )
        assert answer.status_code == 403, action
        assert "came from another site (http://testserver:8081)" in unescape(answer.text)
        referer = client.post(
            action, data=data, headers={"Referer": f"{OTHER_SITE}/evil"}, follow_redirects=False
        )
        assert referer.status_code == 403, action
    # nothing changed: still signed in, still in its status, no calibration voided
    after = client.get(url)
    assert after.status_code == 200 and 'class="status status-quarantined"' not in after.text
    assert "voided" not in after.text.lower().split("record of changes")[0]


def test_every_form_refuses_a_missing_or_stale_token_and_gives_the_form_back(app) -> None:
    with signed_in_client(app, *TECHNICIAN) as client:
        url = unit_url(FLEET.pot)
        page = client.get(url).text
        without_token(client)
        for action in post_forms(page):
            assert client.post(action, data={"x": "1"}).status_code == 403, action
        refused = client.post(
            f"{url}/events",
            data={"kind": "installed", "location": "Line 3, press 2\nleft side", "note": "é <b>"},
            headers={"Origin": "http://testserver"},
        )
        assert refused.status_code == 403 and refused.headers["X-Refused"] == "csrf"
        assert "without this sign-in's security token" in unescape(refused.text)
        form = re.search(r'<form id="refused-form".*?</form>', refused.text, re.S)
        assert form is not None
        assert f'action="{url}/events"' in form.group(0)
        token = csrf.token_of(client.cookies[csrf.COOKIE])
        assert f'name="csrf_token" value="{token}"' in form.group(0)  # a fresh one, to resend
        assert '<textarea id="refused-2" name="location" rows="6">Line 3, press 2\nleft side' in (
            form.group(0)
        )
        assert 'name="note" value="é &lt;b&gt;"' in form.group(0)  # escaped, as typed
        # sending it again from there (the form's token as a field, like the browser) works
        again = client.post(
            f"{url}/events",
            data={"csrf_token": token, "kind": "installed", "location": "Line 3", "note": ""},
            follow_redirects=False,
        )
        assert again.status_code in (200, 303, 422) and again.status_code != 403

        # a page from before signing in again carries the old sign-in's token
        old = token
        with signed_in_client(app, *TECHNICIAN) as other:
            stale = other.post(
                f"{url}/status", data={"status": "quarantined", "csrf_token": old},
                headers={csrf.HEADER: ""},
            )  # fmt: skip
            assert stale.status_code == 403
            assert 'class="status status-quarantined"' not in other.get(url).text


def test_the_password_never_comes_back(app) -> None:
    with signed_in_client(app, *TECHNICIAN) as client:
        without_token(client)
        refused = client.post(
            "/signin", data={"name": "tess", "password": "bench-pass-1", "next": "/"}
        )
        assert refused.status_code == 403
        assert "bench-pass-1" not in refused.text
        assert 'name="name" value="tess"' in refused.text


def test_the_right_token_and_origin_are_accepted(client) -> None:
    url = unit_url(FLEET.pot)
    moved = client.post(
        f"{url}/status",
        data={"status": "quarantined"},
        headers={"Origin": "http://testserver"},
        follow_redirects=False,
    )
    assert moved.status_code == 303
    assert 'class="status status-quarantined"' in client.get(url).text
    out = client.post("/signout", follow_redirects=False)
    assert out.status_code == 303 and out.headers["location"] == "/signin"


def test_signing_in_from_another_site_is_refused(app) -> None:
    with TestClient(app) as client:
        data = {"name": TECHNICIAN[0], "password": TECHNICIAN[1], "next": "/"}
        foreign = client.post("/signin", data=data, headers={"Origin": OTHER_SITE})
        assert foreign.status_code == 403 and csrf.COOKIE not in client.cookies
        null = client.post("/signin", data=data, headers={"Origin": "null"})
        assert null.status_code == 403
        ours = client.post(
            "/signin", data=data, headers={"Origin": "http://testserver"}, follow_redirects=False
        )
        assert ours.status_code == 303 and csrf.COOKIE in client.cookies


def test_the_api_with_a_bearer_token_is_unchanged(app) -> None:
    from server.accounts import service as accounts

    with app.state.sessionmaker() as session:
        raw = accounts.create_token(session, accounts.get_user(session, TECHNICIAN[0]), "t")
        session.commit()
    with TestClient(app) as client:
        answer = client.patch(
            f"/api/v1/units/{FLEET.pot}",
            json={"status": "quarantined"},
            headers={"Authorization": f"Bearer {raw}", "Origin": OTHER_SITE},
        )
        assert answer.status_code == 200 and answer.json()["status"] == "quarantined"


def test_every_post_form_in_the_templates_carries_the_token() -> None:
    """The one-line rule of DEVELOPERS.md: ``{{ csrf_input() }}`` in every POST form (htmx
    requests get the header from <body>)."""
    missing = []
    for path in sorted(TEMPLATES.rglob("*.html")):
        text = path.read_text()
        for form in re.finditer(r"<form\b[^>]*>(.*?)</form>", text, re.S):
            if 'method="post"' in form.group(0).split(">", 1)[0] and (
                "{{ csrf_input() }}" not in form.group(1)
            ):
                missing.append(f"{path.relative_to(TEMPLATES)}: {form.group(0)[:80]}")
    assert not missing, missing
    base = (TEMPLATES / "base.html").read_text()
    assert 'hx-headers=\'{"X-CSRF-Token": "{{ csrf_token() }}"}\'' in base


def test_no_page_can_be_framed_by_another_site(client) -> None:
    for path in ("/", "/signin", f"{unit_url(FLEET.pot)}"):
        answer = client.get(path)
        assert answer.headers["X-Frame-Options"] == "DENY"
        assert answer.headers["Content-Security-Policy"] == "frame-ancestors 'none'"
