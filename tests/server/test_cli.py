"""The `sensorledger` command, run in-process: main([...]) returns the exit status.

No test starts a long-running server: `serve` is checked up to the point where it would call
uvicorn (replaced by a recorder), and with a port that is already taken.
"""

from __future__ import annotations

import io
import json
import re
import socket
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import sqlalchemy as sa
from alembic.script import ScriptDirectory
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session

import shared
from server import cli
from server.accounts.models import User
from server.accounts.service import check_password
from server.app import create_app
from server.cli import accounts as cli_accounts
from server.cli import main
from server.config import Settings
from server.db import make_engine
from server.migrate import alembic_config


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
    monkeypatch.setattr("uvicorn.run", lambda app, **kw: calls.append({"app": app, **kw}))
    return calls


def test_db_upgrade_creates_the_schema_and_says_which_revision(capsys, db_file) -> None:
    code, out, err = run(capsys, "db", "upgrade", "--db", db_file)
    assert (code, err) == (0, "")
    head = ScriptDirectory.from_config(alembic_config()).get_current_head()
    assert f"upgraded from an empty database to revision {head} (the newest)" in out
    assert str(Path(db_file).resolve()) in out
    engine = make_engine(f"sqlite:///{db_file}")
    tables = sa.inspect(engine).get_table_names()
    engine.dispose()
    assert {"sensor_type", "unit", "calibration_session", "user_account", "token"} <= set(tables)
    code, out, _ = run(capsys, "db", "upgrade", "--db", db_file)
    assert code == 0 and f"already at revision {head}" in out


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
    monkeypatch.setattr(cli_accounts.getpass, "getpass", lambda prompt="": next(answers))
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


# -- fit: offline, a file of points ---------------------------------------------------------------


def pot_csv(path: Path, *, header: str = "reference_value,reading", extra: str = "") -> Path:
    """An invented 300 deg pot: 0.0733 deg/count with small known deviations (no source)."""
    counts = np.linspace(100, 4000, 11)
    deviations = np.array([0.01, -0.02, 0.015, 0, -0.01, 0.02, -0.015, 0.005, 0, -0.005, 0.01])
    degrees = -7.0 + 0.0733 * counts + deviations
    rows = "".join(f"{float(v)!r},{float(r)!r}\n" for v, r in zip(degrees, counts, strict=True))
    path.write_text(f"{header}\n{rows}{extra}")
    return path


def ranger_csv(path: Path) -> Path:
    """Invented rangefinder: counts = 41000/(mm + 12) + 35, folding back below 70 mm."""
    mm = np.array([30.0, 50.0, 70, 90, 120, 160, 220, 300, 400, 550, 700])
    counts = np.round(41000 / (mm + 12) + 35)
    counts[:2] = [330.0, 460.0]
    rng = np.random.default_rng(5)
    counts = counts + rng.normal(0, 0.3, counts.size)
    path.write_text(
        "reference_value,reading\n"
        + "".join(f"{v:g},{r:.2f}\n" for v, r in zip(mm, counts, strict=True))
    )
    return path


def test_fit_reports_a_named_family_without_a_database(capsys, tmp_path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("SENSORLEDGER_DATABASE_URL", f"sqlite:///{tmp_path / 'never.db'}")
    csv_file = pot_csv(tmp_path / "pot.csv")
    code, out, err = run(capsys, "fit", str(csv_file), "--family", "line")
    assert (code, err) == (0, "")
    assert not (tmp_path / "never.db").exists() and not (tmp_path / "data").exists()
    data = np.loadtxt(csv_file, delimiter=",", skiprows=1)
    slope, intercept = np.polyfit(data[:, 1], data[:, 0], 1)  # numpy as the reference
    assert "family        line\n" in out
    assert "formula       value = c0 + c1·r" in out
    params = dict(re.findall(r"^  (c[01])\s+(\S+)\s+± \S+$", out, re.M))
    assert float(params["c0"]) == pytest.approx(intercept, rel=1e-6)  # 7 significant digits
    assert float(params["c1"]) == pytest.approx(slope, rel=1e-6)
    assert "dof           9\n" in out
    assert "valid range   100 to 4000 (reading units" in out
    assert "excluded      none" in out and "suspect       none" in out
    assert "lack of fit   not tested" in out
    assert "Ranking" not in out  # a named family is not ranked


def test_fit_without_a_family_ranks_the_catalog(capsys, tmp_path) -> None:
    code, out, err = run(capsys, "fit", str(ranger_csv(tmp_path / "ranger.csv")))
    assert (code, err) == (0, "")
    assert "Ranking by AICc (lower is better)" in out
    rows = re.findall(r"^  (\S+)\s+(\d+)\s+(\S+)\s+(\S+)\s+(\S+)\s+(yes|no)(.*)$", out, re.M)
    labels = [r[0] for r in rows]
    assert "line" in labels and "inverse_offset" in labels
    [recommended] = [r for r in rows if "<- recommended" in r[6]]
    assert float(recommended[3]) <= 2.0  # within delta-AICc 2 of the best
    fitted = [r for r in rows if r[3] != "—"]
    assert [float(r[2]) for r in fitted] == sorted(float(r[2]) for r in fitted)  # by AICc
    assert f"family        {recommended[0]}" in out and "[recommended]" in out
    assert re.search(r"^excluded      #1 \(30, [\d.]+\): fold-back", out, re.M)  # with the reason
    assert "Recommendation: " in out
    # only families that fit are ranked; the others are named once
    not_fitted = re.search(r"^Could not be fitted: (.*)\.$", out, re.M)
    assert not_fitted is None or all(n not in labels for n in not_fitted.group(1).split(", "))


def test_fit_json_is_the_fit_plus_the_ranking(capsys, tmp_path) -> None:
    code, out, err = run(capsys, "fit", str(ranger_csv(tmp_path / "r.csv")), "--json")
    assert (code, err) == (0, "")
    doc = json.loads(out)
    fitted = shared.Fit.from_dict(doc)  # Fit.to_dict keys, read back by the engine
    assert doc["ranking"]["recommended"] and doc["chosen_because"] == "recommended"
    assert fitted.family == doc["family"] and doc["stderr"].keys() == doc["params"].keys()
    assert [e[0] for e in doc["excluded"]] == [0, 1] and isinstance(doc["suspects"], list)

    csv_file = pot_csv(tmp_path / "pot.csv")
    code, out, _ = run(capsys, "fit", str(csv_file), "--family", "line", "--json",
                       "--noise", "reading")  # fmt: skip
    doc = json.loads(out)
    assert code == 0 and doc["ranking"] is None and doc["noise"] == "reading"
    # noise in the reading: the line is the inverse of the reading-on-value regression (numpy)
    data = np.loadtxt(csv_file, delimiter=",", skiprows=1)
    slope, intercept = np.polyfit(data[:, 0], data[:, 1], 1)
    assert doc["params"]["c1"] == pytest.approx(1 / slope, rel=1e-8)
    assert doc["params"]["c0"] == pytest.approx(-intercept / slope, rel=1e-8)


def test_fit_shows_excluded_suspect_points_and_lack_of_fit(capsys, tmp_path) -> None:
    csv_file = pot_csv(
        tmp_path / "pot.csv",
        header="reference_value,reading,excluded,exclude_reason",
        extra="100.0,1500,yes,probe slipped\n",
    )
    text = csv_file.read_text().splitlines()
    text[7] = text[7].split(",")[0] + ",2500.0"  # one reading 19 counts (1.4 deg) off
    # three reference values measured twice, the repeat reading one count higher
    repeats = [f"{row.split(',')[0]},{float(row.split(',')[1]) + 1}" for row in text[2:5]]
    csv_file.write_text("\n".join(text + repeats) + "\n")
    code, out, err = run(capsys, "fit", str(csv_file), "--family", "polynomial", "--degree", "2")
    assert (code, err) == (0, ""), err
    assert "family        polynomial (degree=2)" in out
    assert "excluded      #12 (100, 1500): probe slipped" in out
    assert re.search(r"^suspect       #7 \([\d.]+, 2500\): studentised residual", out, re.M)
    assert re.search(r"^lack of fit   F = \S+ on 8 and 3 dof, p = \S+: ", out, re.M)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["nope.csv"], "error: cannot read nope.csv: No such file or directory"),
        (["bad.csv"], "error: bad.csv: the header row must name reference_value, reading"),
        (["row.csv"], "error: row.csv: row 3, column reading"),
        (["pot.csv", "--family", "nonesuch"], "error: unknown family 'nonesuch'; the catalog"),
        (["pot.csv", "--family", "line", "--degree", "3"], "error: line has no degree option"),
        (["few.csv", "--family", "polynomial", "--degree", "5"], "error: cannot fit polynomial"),
    ],
)
def test_fit_mistakes_exit_2_with_one_line(capsys, tmp_path, monkeypatch, argv, message) -> None:
    monkeypatch.chdir(tmp_path)
    pot_csv(tmp_path / "pot.csv")
    (tmp_path / "bad.csv").write_text("distance,counts\n1,2\n")
    (tmp_path / "row.csv").write_text("reference_value,reading\n1,2\n3,four\n")
    (tmp_path / "few.csv").write_text("reference_value,reading\n1,2\n2,3\n3,5\n4,7\n")
    code, out, err = run(capsys, "fit", *argv)
    assert code == 2 and out == ""
    assert err.startswith(message), err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


WEB_STACK = {"fastapi", "starlette", "uvicorn", "jinja2", "plotly", "alembic"}


def modules_after(code: str) -> set[str]:
    """The modules a clean interpreter has loaded after running ``code``."""
    probe = f"import sys\n{code}\nprint(' '.join(sorted(sys.modules)))"
    root = Path(__file__).resolve().parents[2]
    out = subprocess.run(
        [sys.executable, "-c", probe], capture_output=True, text=True, check=True, cwd=root
    )
    return set(out.stdout.split())


def test_loading_the_cli_imports_only_the_standard_library() -> None:
    """`sensorledger --help` stays quick: each command imports its own needs when it runs."""
    loaded = modules_after("import server.cli")
    tops = {m.split(".")[0] for m in loaded}
    assert tops & (WEB_STACK | {"sqlalchemy", "pydantic", "numpy", "scipy", "shared"}) == set()
    ours = {m for m in loaded if m.startswith("server.")}
    assert "server.cli" in ours and all(m.startswith("server.cli") for m in ours), ours


def test_help_and_fit_load_neither_uvicorn_nor_the_app(tmp_path) -> None:
    loaded = modules_after("from server.cli import main\nassert main(['--help']) == 0")
    assert {m.split(".")[0] for m in loaded} & WEB_STACK == set()
    csv_file = pot_csv(tmp_path / "pot.csv")
    loaded = modules_after(f"from server.cli import main\nmain(['fit', {str(csv_file)!r}])")
    assert "shared.ranking" in loaded  # it did fit
    # fastapi still comes in through server.errors and server.db; the app and the server do not
    assert {m.split(".")[0] for m in loaded} & {"uvicorn", "jinja2", "plotly", "alembic"} == set()
    assert {m for m in loaded if m.startswith(("server.app", "server.demo"))} == set()


def test_the_written_out_choices_are_the_models_values() -> None:
    from server.accounts.models import Role
    from server.calibrations.models import SessionKind

    assert tuple(r.value for r in Role) == cli.ROLES
    assert tuple(k.value for k in SessionKind) == cli.KINDS


def test_fit_is_a_row_of_the_command_table(capsys) -> None:
    assert ("fit",) in [c.path for c in cli.COMMANDS]
    code, out, _ = run(capsys, "--help")
    assert code == 0 and re.search(r"^\s+fit\s+fit points from a CSV file", out, re.M)


# -- export ---------------------------------------------------------------------------------------


@pytest.fixture
def seeded_url(db_url: str) -> str:
    """The browser suite's small fleet (IR rangefinders 0..4095 counts, a pot 0..1023 counts)."""
    from tests.web.seed import seed

    seed(db_url)
    return db_url


def test_export_csv_has_the_header_and_a_row_per_step(capsys, seeded_url) -> None:
    code, out, err = run(capsys, "export", "POT-0001", "--format", "csv", "--db", seeded_url)
    assert (code, err) == (0, ""), err
    lines = out.rstrip("\n").split("\n")
    assert lines[0] == "reading [counts],value [deg],expanded uncertainty [deg] (k = 2),status"
    assert len(lines) == 1 + 1024  # codes 0..1023
    code, out, _ = run(
        capsys, "export", "POT-0001", "--format", "csv", "--step", "10", "--db", seeded_url
    )
    assert code == 0 and len(out.rstrip("\n").split("\n")) == 1 + 103  # 0, 10, ..., 1020


def test_export_json_to_a_file(capsys, seeded_url, tmp_path) -> None:
    target = tmp_path / "table.json"
    code, out, err = run(
        capsys, "export", "IR-0001", "--format", "json", "--output", str(target),
        "--db", seeded_url,
    )  # fmt: skip
    assert code == 0 and out == "" and str(target) in err
    doc = json.loads(target.read_text())
    assert doc["reading_unit"] == "counts" and len(doc["rows"]) == 4096


def test_export_c_compiles_with_gcc(capsys, sqlite_url, tmp_path) -> None:
    import shutil
    import subprocess

    from tests.conftest import missing
    from tests.web.seed import seed

    gcc = shutil.which("gcc")
    if gcc is None:
        missing("gcc is not installed")
    seed(sqlite_url)
    for serial in ("IR-0001", "POT-0001"):
        code, out, err = run(capsys, "export", serial, "--format", "c", "--db", sqlite_url)
        assert (code, err) == (0, ""), err
        header = tmp_path / f"{serial}.h"
        header.write_text(out)
        name = serial.lower().replace("-", "_")
        assert f"static inline int32_t {name}_lut_milli(int32_t reading)" in out
        source = tmp_path / f"{name}.c"
        source.write_text(
            f'#include "{header.name}"\n'
            f"int32_t probe_{name}(int32_t r) {{ return {name}_lut_milli(r); }}\n"
        )
        compiled = subprocess.run(
            [gcc, "-std=c99", "-Wall", "-Wextra", "-Werror", "-c", str(source),
             "-o", str(tmp_path / f"{name}.o")],
            capture_output=True, text=True, cwd=tmp_path,
        )  # fmt: skip
        assert compiled.returncode == 0, compiled.stderr


def test_export_mistakes_say_error_and_exit_2(capsys, sqlite_url) -> None:
    from tests.web.seed import seed

    seed(sqlite_url)
    code, out, err = run(capsys, "export", "IR-0003", "--format", "csv", "--db", sqlite_url)
    assert code == 2 and out == ""
    assert err.startswith("error: unit 'IR-0003' has no current calibration")
    code, _, err = run(capsys, "export", "NOPE-1", "--format", "csv", "--db", sqlite_url)
    assert code == 2 and err == "error: unit 'NOPE-1' not found\n"
    code, _, err = run(capsys, "export", "IR-0001", "--format", "xml", "--db", sqlite_url)
    assert code == 2 and "invalid choice" in err
    code, _, err = run(
        capsys, "export", "IR-0001", "--format", "csv", "--step", "0", "--db", sqlite_url
    )
    assert code == 2 and "positive number" in err
