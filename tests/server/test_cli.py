"""The `sensorledger` command, run in-process: main([...]) returns the exit status.

No test starts a long-running server: `serve` is checked up to the point where it would call
uvicorn (replaced by a recorder), and with a port that is already taken.
"""

from __future__ import annotations

import io
import socket
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session

from server import cli
from server.accounts.models import User
from server.accounts.service import check_password
from server.app import create_app
from server.cli import main
from server.config import Settings
from server.db import make_engine


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def db_file(tmp_path: Path) -> str:
    return str(tmp_path / "cli" / "sensorledger.db")


def users_in(url: str) -> dict[str, User]:
    engine = make_engine(url)
    with Session(engine) as session:
        found = {u.name: u for u in session.scalars(sa.select(User))}
    engine.dispose()
    return found


@pytest.fixture
def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@pytest.fixture
def uvicorn_calls(monkeypatch: pytest.MonkeyPatch) -> list[dict[str, Any]]:
    """Replace uvicorn.run with a recorder: `serve` returns as soon as it would start serving."""
    calls: list[dict[str, Any]] = []
    monkeypatch.setattr(cli.uvicorn, "run", lambda app, **kw: calls.append({"app": app, **kw}))
    return calls


def test_db_upgrade_creates_the_schema_and_says_which_revision(capsys, db_file) -> None:
    code, out, err = run(capsys, "db", "upgrade", "--db", db_file)
    assert (code, err) == (0, "")
    assert "upgraded from an empty database to revision 0001 (the newest)" in out
    assert str(Path(db_file).resolve()) in out
    engine = make_engine(f"sqlite:///{db_file}")
    tables = sa.inspect(engine).get_table_names()
    engine.dispose()
    assert {"sensor_type", "unit", "calibration_session", "user_account", "token"} <= set(tables)
    code, out, _ = run(capsys, "db", "upgrade", "--db", db_file)
    assert code == 0 and "already at revision 0001" in out


def test_the_environment_names_the_database_when_db_is_absent(capsys, tmp_path, monkeypatch):
    path = tmp_path / "from-env.db"
    monkeypatch.setenv("SENSORLEDGER_DATABASE_URL", f"sqlite:///{path}")
    code, out, _ = run(capsys, "db", "upgrade")
    assert code == 0 and path.exists() and str(path) in out


def test_token_from_the_cli_authenticates_against_the_api(capsys, db_url) -> None:
    """On a SQLite file and on PostgreSQL: user add, token create, then the API accepts it."""
    code, out, err = run(
        capsys, "user", "add", "ada", "--role", "technician", "--password", "s3cret", "--db", db_url
    )
    assert (code, err) == (0, ""), err
    assert "Created user ada (technician)" in out
    code, out, err = run(capsys, "token", "create", "ada", "--label", "bench PC", "--db", db_url)
    assert (code, err) == (0, ""), err
    *explanation, token = out.rstrip("\n").split("\n")
    assert token.strip() == token and " " not in token and len(token) >= 40
    assert any("Authorization: Bearer" in line for line in explanation)
    assert all(token not in line for line in explanation)

    with TestClient(create_app(Settings(database_url=db_url))) as client:
        ok = client.get("/api/v1/units", headers={"Authorization": f"Bearer {token}"})
        assert ok.status_code == 200, ok.text
        assert ok.json()["total"] == 0
        refused = client.get("/api/v1/units", headers={"Authorization": "Bearer not-a-token"})
        assert refused.status_code == 401


def test_unknown_user_is_a_clear_error(capsys, db_file) -> None:
    code, out, err = run(capsys, "token", "create", "nobody", "--db", db_file)
    assert code == 2 and out == ""
    assert err.startswith("error: user 'nobody' not found; create the user first with: ")
    assert "sensorledger user add nobody" in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1


def test_a_taken_name_and_a_short_password_are_mistakes(capsys, db_file) -> None:
    add = ("user", "add", "ada", "--role", "admin", "--db", db_file)
    assert run(capsys, *add, "--password", "s3cret")[0] == 0
    code, _, err = run(capsys, *add, "--password", "other")
    assert (code, err) == (2, "error: user 'ada' exists already\n")
    code, _, err = run(capsys, "user", "add", "bo", "--role", "admin", "--password", "abc",
                       "--db", db_file)  # fmt: skip
    assert (code, err) == (2, "error: a password needs at least 4 characters\n")
    assert set(users_in(f"sqlite:///{db_file}")) == {"ada"}


def test_user_add_reads_the_password_from_stdin(capsys, db_file, monkeypatch) -> None:
    monkeypatch.setattr("sys.stdin", io.StringIO("from stdin 42\n"))
    code, _, err = run(capsys, "user", "add", "cy", "--role", "viewer", "--password", "-",
                       "--db", db_file)  # fmt: skip
    assert (code, err) == (0, "")
    assert check_password("from stdin 42", users_in(f"sqlite:///{db_file}")["cy"].password_hash)


def test_user_add_asks_twice_and_refuses_two_different_passwords(capsys, db_file, monkeypatch):
    answers: Iterator[str] = iter(["first-try", "second-try", "same-pw", "same-pw"])
    monkeypatch.setattr(cli.getpass, "getpass", lambda prompt="": next(answers))
    code, _, err = run(capsys, "user", "add", "di", "--role", "admin", "--db", db_file)
    assert (code, err) == (2, "error: the two passwords differ; no user was created\n")
    code, _, err = run(capsys, "user", "add", "di", "--role", "admin", "--db", db_file)
    assert (code, err) == (0, "")
    assert check_password("same-pw", users_in(f"sqlite:///{db_file}")["di"].password_hash)


def test_usage_mistakes_exit_2_without_a_traceback(capsys, db_file) -> None:
    code, _, err = run(capsys, "user", "add", "ed", "--role", "boss", "--db", db_file)
    assert code == 2 and "invalid choice: 'boss'" in err
    code, _, err = run(capsys, "db")
    assert code == 2 and "upgrade" in err
    code, _, err = run(capsys, "db", "upgrade", "--db", "nosuchdialect://x")
    assert code == 2 and err.startswith("error: cannot open the database 'nosuchdialect://x'")


def test_a_file_that_is_not_a_database_exits_1(capsys, tmp_path) -> None:
    junk = tmp_path / "notes.txt"
    junk.write_text("not a database, just notes\n" * 100)
    code, _, err = run(capsys, "db", "upgrade", "--db", str(junk))
    assert code == 1 and err.startswith("error: cannot use the database ")
    assert "Traceback" not in err


def test_serve_refuses_a_port_in_use(capsys, db_file, uvicorn_calls) -> None:
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        code, out, err = run(capsys, "serve", "--db", db_file, "--port", str(port))
    assert code == 1 and out == "" and uvicorn_calls == []
    assert err.startswith(f"error: port {port} on 127.0.0.1 is already in use")
    assert "--port" in err and len(err.strip().splitlines()) == 1
    assert not Path(db_file).exists(), "nothing is set up before the port is known to be free"


def test_serve_demo_loads_once_and_says_where_and_how_to_sign_in(
    capsys, db_file, free_port, uvicorn_calls
) -> None:
    code, out, err = run(capsys, "serve", "--demo", "--db", db_file, "--port", str(free_port))
    assert (code, err) == (0, "")
    assert f"Open http://127.0.0.1:{free_port}/ in a browser." in out
    assert "Loaded the demo data (invented)" in out and "40 units" in out
    assert 'Sign in as user "demo" with password "demo"' in out
    assert "exist only in the demo data" in out and "Ctrl+C" in out
    [call] = uvicorn_calls
    assert (call["host"], call["port"], call["log_level"]) == ("127.0.0.1", free_port, "warning")

    code, out, _ = run(capsys, "serve", "--demo", "--db", db_file, "--port", str(free_port))
    assert code == 0 and "the demo fleet was not loaded" in out
    assert "40 unit(s)" in out and 'Sign in as user "demo"' in out


def test_serve_without_users_says_how_to_create_one(capsys, db_file, free_port, uvicorn_calls):
    code, out, _ = run(capsys, "serve", "--db", db_file, "--port", str(free_port))
    assert code == 0 and len(uvicorn_calls) == 1
    assert "No user exists yet" in out
    assert f"sensorledger user add NAME --role admin --db {db_file}" in out
    assert "demo" not in out
