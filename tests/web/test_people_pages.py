"""/admin/people without a browser: an admin sees people, tokens and failed sign-ins and changes
them (the service of `sensorledger user ...`); others are refused; every change is audited."""

from __future__ import annotations

import re
from html import unescape
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from server.accounts import service as accounts
from server.accounts.models import Role, Token
from server.audit.models import AuditEntry
from tests.web.conftest import signed_in_client
from tests.web.seed import TECHNICIAN, VIEWER, seed

ADMIN = ("ada", "admin-pass-1")


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("people") / "sensorledger.db"
    seed(f"sqlite:///{path}")
    return path


@pytest.fixture
def admin(app) -> TestClient:
    with app.state.sessionmaker() as session:
        accounts.create_user(session, ADMIN[0], Role.admin, password=ADMIN[1])
        session.commit()
    return signed_in_client(app, *ADMIN)


def text(html: str) -> str:
    return re.sub(r"\s+", " ", unescape(re.sub(r"<[^>]+>", " ", html)))


def row(html: str, row_id: str) -> str:
    """The words of a table row as shown: the chosen role only, no hidden labels or forms."""
    found = re.search(rf'<tr id="{row_id}".*?</tr>', html, re.S)
    assert found is not None, row_id
    shown = re.sub(r'<option value="[^"]*">[^<]*</option>', "", found.group(0))
    shown = re.sub(r'<label class="visually-hidden".*?</label>|<details>.*?</details>', "", shown,
                   flags=re.S)  # fmt: skip
    return text(shown).strip()


def audit_actions(app) -> list[tuple[str | None, str, str]]:
    with app.state.sessionmaker() as session:
        rows = session.scalars(select(AuditEntry).order_by(AuditEntry.id)).all()
        return [
            (e.actor, e.action, e.subject) for e in rows if e.subject_kind in {"user", "address"}
        ]


def test_only_admins_see_the_page(app, client, viewer, admin) -> None:
    assert client.get("/admin/people").status_code == 403
    assert viewer.get("/admin/people").status_code == 403
    assert client.post("/admin/people/vic/disable").status_code == 403
    page = admin.get("/admin/people")
    assert page.status_code == 200
    assert '<a href="/admin/people" aria-current="page">People</a>' in page.text
    assert "People</a>" not in client.get("/").text
    assert row(page.text, "user-tess").startswith("tess technician")
    assert "ada (you)" in row(page.text, "user-ada")


def test_an_admin_changes_role_password_status_and_tokens(app, admin) -> None:
    with app.state.sessionmaker() as session:
        raw = accounts.create_token(session, accounts.get_user(session, VIEWER[0]), "bench PC")
        session.commit()
    bearer = {"Authorization": f"Bearer {raw}"}
    with signed_in_client(app, *VIEWER) as vic, TestClient(app) as api:
        assert api.get("/api/v1/units", headers=bearer).status_code == 200
        page = admin.get("/admin/people").text
        assert "bench PC" in page and row(page, "user-vic").split()[:7] == [
            "vic", "viewer", "Set", "enabled", "Disable", "1", "1"
        ]  # fmt: skip

        done = admin.post(
            "/admin/people/vic/role", data={"role": "technician"}, follow_redirects=False
        )
        assert done.status_code == 303
        assert "Vic's role changed." in text(admin.get(done.headers["location"]).text)
        assert row(admin.get("/admin/people").text, "user-vic").startswith("vic technician")

        differ = admin.post(
            "/admin/people/vic/password", data={"password": "abcd1", "again": "abcd2"}
        )
        assert differ.status_code == 422 and "the two passwords differ" in differ.text.lower()
        assert vic.get("/", follow_redirects=False).status_code == 200  # nothing changed
        changed = admin.post(
            "/admin/people/vic/password", data={"password": "fresh-pw-1", "again": "fresh-pw-1"}
        )
        assert changed.status_code == 200 and "their browser sign-ins ended" in changed.text
        assert vic.get("/", follow_redirects=False).status_code == 303  # signed out
        assert api.get("/api/v1/units", headers=bearer).status_code == 200  # API kept

        token_id = next(
            int(m) for m in re.findall(r'<tr id="token-(\d+)">', admin.get("/admin/people").text)
            if "bench PC" in row(admin.get("/admin/people").text, f"token-{m}")
        )  # fmt: skip
        admin.post(f"/admin/tokens/{token_id}/revoke")
        assert api.get("/api/v1/units", headers=bearer).status_code == 401
        again = admin.post(f"/admin/tokens/{token_id}/revoke")
        assert again.status_code == 409 and "revoked already" in again.text.lower()

        with signed_in_client(app, TECHNICIAN[0], TECHNICIAN[1]) as tess:
            assert tess.get("/", follow_redirects=False).status_code == 200
            page = admin.post("/admin/people/tess/disable").text
            assert "Tess is disabled" in text(page)
            assert "disabled" in row(page, "user-tess")
            assert tess.get("/", follow_redirects=False).status_code == 303  # ended at once
            admin.post("/admin/people/tess/enable")
            assert "enabled" in row(admin.get("/admin/people").text, "user-tess")

        me = admin.post("/admin/people/ada/disable")
        assert me.status_code == 409 and "only admin left" in me.text.lower()
        # an admin's own new password keeps their own sign-in
        admin.post("/admin/people/ada/password", data={"password": "pw-ada-2", "again": "pw-ada-2"})
        assert admin.get("/admin/people").status_code == 200
    assert [a for a in audit_actions(app) if a[0] == "ada"] == [
        ("ada", "user.role_changed", "vic"),
        ("ada", "user.password_changed", "vic"),
        ("ada", "token.revoked", "vic"),
        ("ada", "user.disabled", "tess"),
        ("ada", "user.enabled", "tess"),
        ("ada", "user.password_changed", "ada"),
    ]
    with app.state.sessionmaker() as session:  # the admin's own sign-in is the one left
        browser = session.scalars(
            select(Token).where(Token.kind == "browser", Token.revoked_at.is_(None))
        ).all()
        assert [t.user.name for t in browser] == ["ada"]


def test_failed_sign_ins_show_and_clear(app, admin) -> None:
    with TestClient(app) as guesser:
        for _ in range(5):
            guesser.post("/signin", data={"name": "tess", "password": "x", "next": "/"})
        page = admin.get("/admin/people").text
        assert "5 in a row, locked until" in row(page, "user-tess")
        assert "testclient" in text(page.split('id="addresses"')[1])
        cleared = admin.post("/admin/signin-locks/clear", data={"kind": "user", "key": "tess"})
        assert "Failed sign-ins of user tess cleared." in text(cleared.text)
        assert "in a row" not in row(cleared.text, "user-tess")
        good = {"name": TECHNICIAN[0], "password": TECHNICIAN[1], "next": "/"}
        assert guesser.post("/signin", data=good, follow_redirects=False).status_code == 303
    missing = admin.post("/admin/signin-locks/clear", data={"kind": "user", "key": "tess"})
    assert missing.status_code == 404 and "Nothing was changed" in missing.text


def test_the_done_line_never_shows_text_from_the_link(admin) -> None:
    page = admin.get("/admin/people", params={"done": "Your account is hacked", "who": "x"}).text
    assert "hacked" not in page
