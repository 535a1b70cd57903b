"""`sensorledger user list|passwd|role|disable|enable|unlock`, `token list|revoke` and `restore`
(SQLite and PostgreSQL): each change takes effect on the API at once and is in the audit log."""

from __future__ import annotations

import sqlite3
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.accounts import service as accounts
from server.accounts.models import Role, Token
from server.app import create_app
from server.audit.models import AuditEntry
from server.cli import main
from server.cli.restore import rows_in
from server.config import Settings
from server.db import make_engine
from server.models import Base
from tests.web.seed import seed


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def actions(url: str) -> list[tuple[str, str]]:
    engine = make_engine(url)
    try:
        with Session(engine) as session:
            rows = session.scalars(select(AuditEntry).order_by(AuditEntry.id)).all()
            return [(e.action, e.subject) for e in rows]
    finally:
        engine.dispose()


@pytest.fixture
def people_db(db_url: str, capsys) -> str:
    for name, role in (("ada", "admin"), ("tom", "technician"), ("vic", "viewer")):
        code, _, err = run(
            capsys, "user", "add", name, "--role", role, "--password", f"{name}-pw", "--db", db_url
        )
        assert code == 0, err
    return db_url


def token(capsys, url: str, name: str) -> str:
    code, out, err = run(capsys, "token", "create", name, "--label", "bench PC", "--db", url)
    assert code == 0, err
    return out.strip().splitlines()[-1]


def test_user_list_role_disable_enable(capsys, people_db: str) -> None:
    url = people_db
    raw = token(capsys, url, "tom")
    app = create_app(Settings(database_url=url))
    with TestClient(app) as client:
        bearer = {"Authorization": f"Bearer {raw}"}
        assert client.get("/api/v1/units", headers=bearer).status_code == 200
        assert client.post("/api/v1/sensor-types", json={}, headers=bearer).status_code == 403

        code, out, _ = run(capsys, "user", "list", "--db", url)
        assert code == 0
        lines = out.splitlines()
        assert lines[0].split() [:3] == ["user", "role", "status"]  # fmt: skip
        tom = next(line for line in lines if line.startswith("tom "))
        assert tom.split()[:5] == ["tom", "technician", "enabled", "1", "0"]

        assert run(capsys, "user", "role", "tom", "admin", "--db", url)[0] == 0
        # the role counts from the next request: now it passes the door (a 422, not a 403)
        assert client.post("/api/v1/sensor-types", json={}, headers=bearer).status_code == 422
        assert run(capsys, "user", "role", "tom", "technician", "--db", url)[0] == 0

        code, out, _ = run(capsys, "user", "disable", "tom", "--db", url)
        assert code == 0 and "1 token(s)" in out
        assert client.get("/api/v1/units", headers=bearer).status_code == 401
        signin = {"name": "tom", "password": "tom-pw", "next": "/"}
        refused = client.post("/signin", data=signin, follow_redirects=False)
        assert refused.status_code == 401 and "disabled" in refused.text
        code, _, err = run(capsys, "token", "create", "tom", "--db", url)
        assert code == 2 and "disabled" in err

        assert run(capsys, "user", "enable", "tom", "--db", url)[0] == 0
        assert client.get("/api/v1/units", headers=bearer).status_code == 401  # stays revoked
        assert client.post("/signin", data=signin, follow_redirects=False).status_code == 303

        # the last admin can be neither demoted nor disabled
        code, _, err = run(capsys, "user", "role", "ada", "viewer", "--db", url)
        assert code == 2 and "only admin" in err
        code, _, err = run(capsys, "user", "disable", "ada", "--db", url)
        assert code == 2 and "only admin" in err
        code, _, err = run(capsys, "user", "disable", "nobody", "--db", url)
        assert code == 2 and "'nobody' not found" in err
    app.state.engine.dispose()
    assert [a for a in actions(url) if a[0].startswith(("user.", "token."))] == [
        ("user.created", "ada"),
        ("user.created", "tom"),
        ("user.created", "vic"),
        ("token.created", "tom"),
        ("user.role_changed", "tom"),
        ("user.role_changed", "tom"),
        ("user.disabled", "tom"),
        ("user.enabled", "tom"),
    ]


def test_passwd_ends_sign_ins_and_token_list_revoke(capsys, people_db: str) -> None:
    url = people_db
    raw = token(capsys, url, "vic")
    app = create_app(Settings(database_url=url))
    with TestClient(app) as client, TestClient(app) as browser:
        bearer = {"Authorization": f"Bearer {raw}"}
        assert client.get("/api/v1/units", headers=bearer).status_code == 200  # a last use
        signin = {"name": "vic", "password": "vic-pw", "next": "/"}
        assert browser.post("/signin", data=signin, follow_redirects=False).status_code == 303
        assert browser.get("/", follow_redirects=False).status_code == 200

        code, out, _ = run(capsys, "token", "list", "--db", url)
        assert code == 0
        rows = [line.split() for line in out.splitlines()[1:]]
        api = next(r for r in rows if r[2] == "api")
        assert api[1] == "vic" and out.count("bench PC") == 1
        assert "active" in out and "—" not in " ".join(api[6:8])  # a last use was written
        ids = {r[2]: r[0] for r in rows}

        code, out, _ = run(capsys, "user", "passwd", "vic", "--password", "new-pw-2", "--db", url)
        assert code == 0 and "1 browser sign-in(s) ended" in out
        assert browser.get("/", follow_redirects=False).status_code == 303  # to /signin
        assert client.get("/api/v1/units", headers=bearer).status_code == 200  # API kept

        code, out, _ = run(capsys, "token", "revoke", ids["api"], "--db", url)
        assert code == 0 and f"Revoked token {ids['api']}" in out
        assert client.get("/api/v1/units", headers=bearer).status_code == 401
        code, _, err = run(capsys, "token", "revoke", ids["api"], "--db", url)
        assert code == 2 and "revoked already" in err
        code, out, _ = run(capsys, "token", "list", "--user", "vic", "--db", url)
        assert "No tokens in use" in out
        code, out, _ = run(capsys, "token", "list", "--user", "vic", "--all", "--db", url)
        assert out.count("revoked") == 2
    app.state.engine.dispose()
    assert ("user.password_changed", "vic") in actions(url)
    assert ("token.revoked", "vic") in actions(url)


def test_last_use_is_written_at_most_once_a_minute(people_db: str, capsys) -> None:
    raw = token(capsys, people_db, "vic")
    app = create_app(Settings(database_url=people_db))
    with TestClient(app) as client:
        bearer = {"Authorization": f"Bearer {raw}"}
        client.get("/api/v1/units", headers=bearer)
        with app.state.sessionmaker() as session:
            first = session.scalars(select(Token.last_used_at)).one()
        assert first is not None
        for _ in range(3):
            client.get("/api/v1/units", headers=bearer)
        with app.state.sessionmaker() as session:
            assert session.scalars(select(Token.last_used_at)).one() == first
    app.state.engine.dispose()


def test_unlock_clears_failed_sign_ins(capsys, people_db: str) -> None:
    app = create_app(Settings(database_url=people_db))
    with TestClient(app) as client:
        for _ in range(5):
            client.post("/signin", data={"name": "tom", "password": "x", "next": "/"})
        code, out, _ = run(capsys, "user", "list", "--db", people_db)
        assert "5, locked until" in next(x for x in out.splitlines() if x.startswith("tom "))
        assert run(capsys, "user", "unlock", "tom", "--db", people_db)[0] == 0
        assert run(capsys, "user", "unlock", "--address", "testclient", "--db", people_db)[0] == 0
        good = {"name": "tom", "password": "tom-pw", "next": "/"}
        assert client.post("/signin", data=good, follow_redirects=False).status_code == 303
        code, _, err = run(capsys, "user", "unlock", "tom", "--db", people_db)
        assert code == 2 and "no failed sign-ins" in err
    app.state.engine.dispose()
    assert ("signin.unlocked", "tom") in actions(people_db)


# -- restore --------------------------------------------------------------------------------------


def everything(url: str) -> dict[str, list[dict[str, Any]]]:
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            return {
                t.name: [
                    dict(r._mapping)
                    for r in conn.execute(t.select().order_by(*t.primary_key.columns))
                ]
                for t in Base.metadata.sorted_tables
            }
    finally:
        engine.dispose()


def test_restore_into_an_empty_database_and_never_into_a_full_one(
    capsys, db_url: str, tmp_path: Path
) -> None:
    source = f"sqlite:///{tmp_path / 'source.db'}"
    seed(source)
    backup = tmp_path / "backup.db"
    assert run(capsys, "backup", str(backup), "--db", source)[0] == 0

    code, out, err = run(capsys, "restore", str(backup), "--db", db_url)
    assert (code, err) == (0, ""), err
    assert "Restored" in out
    assert everything(db_url) == everything(source)  # every row of every table

    # the restored database works: new rows get new ids, tokens and passwords carry over
    app = create_app(Settings(database_url=db_url))
    with app.state.sessionmaker() as session:
        user = accounts.create_user(session, "newcomer", Role.viewer, password="pw-new")
        raw = accounts.create_token(session, user, "t")
        session.commit()
    with TestClient(app) as client:
        units = client.get("/api/v1/units", headers={"Authorization": f"Bearer {raw}"})
        assert units.status_code == 200 and units.json()["total"] > 0
        signin = {"name": "tess", "password": "bench-pass-1", "next": "/"}
        assert client.post("/signin", data=signin, follow_redirects=False).status_code == 303
    app.state.engine.dispose()

    before = rows_in(make_engine(db_url))
    code, _, err = run(capsys, "restore", str(backup), "--db", db_url)
    assert code == 2 and "is not empty" in err and "restore only into an empty database" in err
    assert rows_in(make_engine(db_url)) == before


def test_restore_refuses_what_is_not_a_backup(capsys, tmp_path: Path) -> None:
    target = f"sqlite:///{tmp_path / 'new.db'}"
    code, _, err = run(capsys, "restore", str(tmp_path / "missing.db"), "--db", target)
    assert code == 2 and "no such file" in err
    junk = tmp_path / "junk.db"
    junk.write_text("not a database")
    code, _, err = run(capsys, "restore", str(junk), "--db", target)
    assert code == 2 and "not a readable SQLite backup" in err
    empty = tmp_path / "empty.db"
    sqlite3.connect(empty).close()
    code, _, err = run(capsys, "restore", str(empty), "--db", target)
    assert code == 2 and "no sensorledger tables" in err
