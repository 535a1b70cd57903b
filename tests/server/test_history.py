"""`sensorledger import-history` and POST /api/v1/history (SQLite file and PostgreSQL).

Synthetic points (common practice, no source): invented potentiometers, value = 0.1 r plus a
little noise (tests/server/lines.py); the serials, operators and jigs are invented.
"""

from __future__ import annotations

import csv
import io
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa
from sqlalchemy.orm import Session

from server.audit.models import AuditEntry
from server.calibrations import history
from server.calibrations.history_csv import GROUPING, read_history
from server.calibrations.models import CalibrationSession, FitRecord, Point
from server.cli import history as cli_history
from server.db import make_engine
from server.flags.models import Flag, FlagKind
from server.fleet.models import Unit
from tests.server.lines import line_points, pot_type
from tests.server.test_cli import run

POT = "Pot history"
OTHER = "Pot other"
HEADER = [
    "serial",
    "sensor_type",
    "performed_at",
    "operator",
    "reference",
    "reference_value",
    "reading",
]
WHEN = ("2021-02-01T09:00:00+00:00", "2022-02-01T09:00:00+00:00")


def rows_of(
    serial: str,
    when: str,
    seed: int,
    *,
    type_: str = POT,
    shift: float = 0.0,
    bump: float = 0.0,
    operator: str = "tess",
    reference: str = "jig J-1",
) -> list[list[Any]]:
    return [
        [serial, type_, when, operator, reference, p["reference_value"], p["reading"]]
        for p in line_points(seed, shift=shift, bump=bump)
    ]


def write_csv(path: Path, rows: list[list[Any]], header: list[str] = HEADER) -> str:
    with open(path, "w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        out.writerow(header)
        out.writerows(rows)
    return str(path)


@pytest.fixture
def fleet(client, admin, db_url) -> str:
    """Two types (the second to make a serial of the wrong type), unit P-001 of the first,
    Q-001 of the second; the database URL."""
    for name in (POT, OTHER):
        created = client.post(
            "/api/v1/sensor-types",
            json=pot_type(name, families=["line", "polynomial"], drift_limit_abs=0.5),
            headers=admin,
        )
        assert created.status_code == 201, created.text
    for serial, name in (("P-001", POT), ("Q-001", OTHER)):
        made = client.post(
            "/api/v1/units", json={"serial": serial, "sensor_type": name}, headers=admin
        )
        assert made.status_code == 201, made.text
    return db_url


def counts(url: str) -> dict[str, int]:
    engine = make_engine(url)
    with Session(engine) as s:
        found = {
            name: s.scalar(sa.select(sa.func.count()).select_from(model)) or 0
            for name, model in (
                ("sessions", CalibrationSession),
                ("points", Point),
                ("fits", FitRecord),
                ("units", Unit),
            )
        }
    engine.dispose()
    return found


def actions(url: str) -> dict[str, int]:
    engine = make_engine(url)
    with Session(engine) as s:
        query = sa.select(AuditEntry.action, sa.func.count()).group_by(AuditEntry.action)
        found = {action: n for action, n in s.execute(query)}
    engine.dispose()
    return found


def interleaved(*sessions: list[list[Any]]) -> list[list[Any]]:
    """The rows of the sessions taken in turn: a session's rows are not next to each other."""
    out = []
    for group in zip(*sessions, strict=True):
        out += group
    return out


def test_rows_are_grouped_into_sessions_and_missing_units_created(capsys, fleet, tmp_path):
    rows = interleaved(
        rows_of("P-001", WHEN[0], 1),
        rows_of("P-002", WHEN[0], 2),
        rows_of("p-001", WHEN[1], 3),  # the existing unit, in other case: the same unit
        rows_of("P-002", WHEN[0], 4, operator="uma"),  # another operator: another session
        rows_of("P-003", "2021-02-01T10:00:00+01:00", 5),  # offsets read as UTC moments
        rows_of("P-003", "2021-02-01T09:00:00", 6),  # no offset: UTC; the same session
    )
    path = write_csv(tmp_path / "history.csv", rows)
    code, out, err = run(capsys, "import-history", path, "--db", fleet)
    assert (code, err) == (0, ""), err
    assert "66 rows, 5 sessions: 5 stored (66 points, 2 new units)" in out
    assert counts(fleet) == {"sessions": 5, "points": 66, "fits": 5, "units": 4}
    engine = make_engine(fleet)
    with Session(engine) as s:
        by_unit = {
            u.serial: sorted((c.performed_at, c.operator, len(c.points)) for c in u.sessions)
            for u in s.scalars(sa.select(Unit))
        }
        p3 = s.scalar(sa.select(Unit).where(Unit.serial == "P-003"))
        assert p3 is not None and p3.sensor_type.name == POT
        stored = [p.reading for p in p3.sessions[0].points]
    engine.dispose()
    feb = datetime(2021, 2, 1, 9, tzinfo=UTC)
    assert by_unit["P-001"] == [
        (feb, "tess", 11),
        (datetime(2022, 2, 1, 9, tzinfo=UTC), "tess", 11),
    ]
    assert by_unit["P-002"] == [(feb, "tess", 11), (feb, "uma", 11)]
    assert by_unit["P-003"] == [(feb, "tess", 22)]  # two spellings of one moment
    assert by_unit["Q-001"] == []
    # the points in the order of the file
    assert stored == [r[6] for r in rows if r[0] == "P-003"]


def stored_records(url: str, serial: str) -> list[tuple[dict[str, Any], list[Any], dict[str, Any]]]:
    """Each session of the unit: its columns, points and current fit as stored (ids and times
    left out)."""
    engine = make_engine(url)
    out = []
    with Session(engine) as s:
        unit = s.scalar(sa.select(Unit).where(Unit.serial == serial))
        assert unit is not None
        for c in unit.sessions:
            columns = {
                k: getattr(c, k)
                for k in (
                    "performed_at",
                    "operator",
                    "reference",
                    "reference_expanded_u",
                    "reference_k",
                    "extra_u",
                    "extra_label",
                    "kind",
                    "ambient",
                    "notes",
                    "voided_at",
                )
            }
            points = [
                (
                    p.seq,
                    p.reference_value,
                    p.reading,
                    p.repeat_index,
                    p.excluded,
                    p.exclude_reason,
                )
                for p in c.points
            ]
            f = c.current_fit
            assert f is not None and len(c.fits) == 1
            fit = {
                k: getattr(f, k)
                for k in (
                    "family",
                    "options",
                    "result",
                    "decision",
                    "ranking",
                    "diagnostics",
                    "passed",
                    "is_current",
                    "engine_version",
                )
            }
            out.append((columns, points, fit))
    engine.dispose()
    return out


def test_stored_fits_are_those_of_a_normal_save(capsys, fleet, tmp_path, client, technician):
    """The same points imported and saved one by one through the API store the same rows."""
    sessions = [
        ("H-001", WHEN[0], 11, 0.0),
        ("H-001", WHEN[1], 12, 0.4),
        ("H-002", WHEN[0], 13, 0.0),
        ("H-003", WHEN[1], 14, 3.0),  # a point 3 deg off: fails its tolerance
    ]
    rows = [
        r for serial, when, seed, bump in sessions for r in rows_of(serial, when, seed, bump=bump)
    ]
    code, _, err = run(capsys, "import-history", write_csv(tmp_path / "h.csv", rows), "--db", fleet)
    assert (code, err) == (0, "")
    for serial, when, seed, bump in sessions:
        twin = serial.replace("H-", "N-")
        client.post("/api/v1/units", json={"serial": twin, "sensor_type": POT}, headers=technician)
        r = client.post(
            f"/api/v1/units/{twin}/calibrations",
            json={
                "performed_at": when,
                "operator": "tess",
                "reference": "jig J-1",
                "points": line_points(seed, bump=bump),
            },
            headers=technician,
        )
        assert r.status_code == 201, r.text
    for serial in ("H-001", "H-002", "H-003"):
        imported = stored_records(fleet, serial)
        saved = stored_records(fleet, serial.replace("H-", "N-"))
        assert imported == saved
    assert [f["passed"] for _, _, f in stored_records(fleet, "H-003")] == [False]


def test_bad_rows_are_named_by_line_and_the_rest_go_in(capsys, fleet, tmp_path):
    good = rows_of("P-010", WHEN[0], 1)
    broken = rows_of("P-011", WHEN[0], 2)
    broken[3][6] = "12x"  # line 2 + 11 + 3 = 16
    rows = [
        *good,  # lines 2-12
        *broken,  # lines 13-23
        *rows_of("P-012", "first of May", 3),  # lines 24-34
        *rows_of("P-013", WHEN[0], 4, type_="Pot nobody made"),  # lines 35-45
        *rows_of("Q-001", WHEN[0], 5),  # 46-56: Q-001 is a unit of the other type
        *rows_of("P-014", WHEN[0], 6)[:1],  # 57: one point cannot be fitted
        *rows_of("P-015", WHEN[1], 7),  # lines 58-68
    ]
    report = tmp_path / "rejected.csv"
    code, out, err = run(
        capsys,
        "import-history",
        write_csv(tmp_path / "bad.csv", rows),
        "--db",
        fleet,
        "--report",
        str(report),
    )
    assert code == 1
    assert "2 stored (22 points, 2 new units)" in out and "5 sessions (45 rows) rejected" in out
    assert "Some rows were rejected" in out
    problems = list(csv.DictReader(report.open(encoding="utf-8")))
    assert [(int(p["line"]), p["session_lines"], p["serial"]) for p in problems] == [
        (16, "13-23", "P-011"),
        (24, "24-34", "P-012"),  # every row of it has the bad date
        (25, "24-34", "P-012"),
        (26, "24-34", "P-012"),
        (27, "24-34", "P-012"),
        (28, "24-34", "P-012"),
        (29, "24-34", "P-012"),
        (30, "24-34", "P-012"),
        (31, "24-34", "P-012"),
        (32, "24-34", "P-012"),
        (33, "24-34", "P-012"),
        (34, "24-34", "P-012"),
        (35, "35-45", "P-013"),
        (46, "46-56", "Q-001"),
        (57, "57", "P-014"),
    ]
    reasons = {int(p["line"]): p["reason"] for p in problems}
    assert reasons[16] == "reading '12x' is not a number"
    assert reasons[24].startswith("performed_at 'first of May' is not a date and time")
    assert reasons[35].startswith("unknown sensor type 'Pot nobody made' (known: ")
    assert reasons[46] == f"unit 'Q-001' is a {OTHER} unit, not {POT}"
    assert reasons[57].startswith("cannot fit the session: ")
    assert "line 16: reading '12x' is not a number (its session, lines 13-23, is not stored)" in err
    assert len(err.splitlines()) == 15  # every problem printed (up to 20 are)
    engine = make_engine(fleet)
    with Session(engine) as s:
        serials = set(s.scalars(sa.select(Unit.serial).join(Unit.sessions)))
    engine.dispose()
    assert serials == {"P-010", "P-015"}  # nothing of P-011: its session is whole or absent
    assert counts(fleet)["units"] == 4  # P-011..P-014 were not created


def test_running_the_same_file_again_stores_nothing_twice(capsys, fleet, tmp_path):
    rows = rows_of("P-001", WHEN[0], 1) + rows_of("P-020", WHEN[1], 2)
    path = write_csv(tmp_path / "again.csv", rows)
    assert run(capsys, "import-history", path, "--db", fleet)[0] == 0
    before, audited = counts(fleet), actions(fleet)
    code, out, err = run(capsys, "import-history", path, "--db", fleet)
    assert (code, err) == (0, "")
    assert "2 sessions: 0 stored (0 points), 2 already present, nothing rejected" in out
    assert counts(fleet) == before
    after = actions(fleet)
    assert after["calibration.saved"] == audited["calibration.saved"] == 2
    assert after["unit.registered"] == audited["unit.registered"] == 3  # P-001, Q-001, P-020
    assert after["history.imported"] == 2


def test_a_batch_that_fails_leaves_whole_sessions_and_a_rerun_finishes(
    capsys, fleet, tmp_path, monkeypatch
):
    rows = [r for i in range(5) for r in rows_of(f"P-03{i}", WHEN[0], 30 + i)]
    path = write_csv(tmp_path / "five.csv", rows)
    real, calls = history._add_entries, []

    def failing(session: Session, entries: list[AuditEntry]) -> None:
        calls.append(len(entries))
        if len(calls) == 4:  # the second batch's session entries (units, sessions, units...)
            raise RuntimeError("the disk is full (a fault in the middle of a batch)")
        real(session, entries)

    monkeypatch.setattr(history, "_add_entries", failing)
    with pytest.raises(RuntimeError):
        run(capsys, "import-history", path, "--db", fleet, "--batch", "2")
    engine = make_engine(fleet)
    with Session(engine) as s:
        stored = {
            c.unit.serial: (len(c.points), len(c.fits))
            for c in s.scalars(sa.select(CalibrationSession))
        }
    engine.dispose()
    assert stored == {"P-030": (11, 1), "P-031": (11, 1)}  # the first batch, whole
    monkeypatch.setattr(history, "_add_entries", real)
    code, out, _ = run(capsys, "import-history", path, "--db", fleet, "--batch", "2")
    assert code == 0 and "3 stored (33 points, 3 new units), 2 already present" in out
    assert counts(fleet)["sessions"] == 5


def test_flags_are_computed_once_at_the_end(capsys, fleet, tmp_path, monkeypatch):
    rows = (
        rows_of("P-040", WHEN[0], 40)
        + rows_of("P-040", WHEN[1], 41, shift=2.0)  # drifted
        + rows_of("P-041", WHEN[0], 42)
        + rows_of("P-041", WHEN[1], 43)
    )
    calls: list[tuple[str, int]] = []
    real = history.recompute_flags

    def recording(session: Session, sensor_type: Any, **kw: Any) -> Any:
        stored = session.scalar(sa.select(sa.func.count()).select_from(CalibrationSession))
        calls.append((sensor_type.name, stored or 0))
        assert kw == {}  # the whole type, not unit by unit
        return real(session, sensor_type, **kw)

    monkeypatch.setattr(history, "recompute_flags", recording)
    code, _, _ = run(
        capsys, "import-history", write_csv(tmp_path / "f.csv", rows), "--db", fleet, "--batch", "1"
    )
    assert code == 0
    assert calls == [(POT, 4)]  # once, for the one type, after every session was stored
    engine = make_engine(fleet)
    with Session(engine) as s:
        drift = [
            f.unit.serial for f in s.scalars(sa.select(Flag)) if f.kind is FlagKind.drift and f.open
        ]
        due = {u.serial: u.due_on for u in s.scalars(sa.select(Unit))}
    engine.dispose()
    assert drift == ["P-040"]
    assert due["P-040"] is not None and due["P-041"] is not None  # stored by the recompute


def test_audit_entries_one_per_session_and_unit(capsys, fleet, tmp_path):
    rows = rows_of("P-001", WHEN[0], 1) + rows_of("P-050", WHEN[0], 2)
    run(capsys, "import-history", write_csv(tmp_path / "a.csv", rows), "--db", fleet)
    engine = make_engine(fleet)
    with Session(engine) as s:
        entries = list(s.scalars(sa.select(AuditEntry).order_by(AuditEntry.id)))
    engine.dispose()
    saved = [e for e in entries if e.action == "calibration.saved"]
    assert sorted(e.subject for e in saved) == ["P-001", "P-050"]
    assert all(
        e.detail["imported_from"].endswith("a.csv") and e.detail["points"] == 11 for e in saved
    )
    assert saved[0].summary == "calibration of 2021-02-01 (periodic) saved: line, passed"
    registered = [e.subject for e in entries if e.action == "unit.registered"]
    assert registered[-1] == "P-050"
    (done,) = [e for e in entries if e.action == "history.imported"]
    assert done.detail["stored"] == 2 and done.detail["units_created"] == 1


@pytest.mark.parametrize(
    ("header", "message"),
    [
        (
            ["serial", "sensor_type", "performed_at", "operator", "reference", "reading"],
            "error: line 1, the header row, must name the columns serial, sensor_type, "
            "performed_at, operator, reference, reference_value, reading (and may name kind, "
            "notes); missing "
            "reference_value (found: serial, sensor_type",
        ),
        ([*HEADER, "colour"], "error: line 1, the header row: unknown column(s) 'colour'"),
        ([*HEADER, "Reading"], "error: line 1, the header row, names reading more than once"),
    ],
)
def test_a_bad_header_exits_2_and_stores_nothing(capsys, fleet, tmp_path, header, message):
    path = write_csv(tmp_path / "h.csv", rows_of("P-060", WHEN[0], 1), header=header)
    code, out, err = run(capsys, "import-history", path, "--db", fleet)
    assert code == 2 and out == ""
    assert err.startswith(message) and len(err.strip().splitlines()) == 1, err
    assert counts(fleet)["sessions"] == 0


def test_usage_mistakes_exit_2(capsys, fleet, tmp_path):
    code, _, err = run(capsys, "import-history", str(tmp_path / "none.csv"), "--db", fleet)
    assert code == 2 and err.startswith("error: cannot read ") and "No such file" in err
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    code, _, err = run(capsys, "import-history", str(empty), "--db", fleet)
    assert code == 2 and err.startswith("error: the file is empty; its first line must be")
    code, _, err = run(capsys, "import-history", str(empty), "--db", fleet, "--batch", "0")
    assert code == 2 and "give at least 1 session" in err
    code, _, err = run(capsys, "import-history", str(empty), "--report", str(tmp_path / "no" / "r"))
    assert code == 2 and err.startswith("error: --report: there is no folder")


def test_standard_input_kind_and_notes(capsys, fleet, tmp_path, monkeypatch):
    rows = [
        [*r, "as_found", "after the shock test" if i == 3 else ""]
        for i, r in enumerate(rows_of("P-070", WHEN[0], 1))
    ]
    text = io.StringIO()
    csv.writer(text).writerows([[*HEADER, "Kind", "notes"], *rows])
    monkeypatch.setattr("sys.stdin", io.TextIOWrapper(io.BytesIO(text.getvalue().encode())))
    code, out, _ = run(capsys, "import-history", "-", "--db", fleet)
    assert code == 0 and out.startswith("standard input: 11 rows, 1 sessions: 1 stored")
    ((columns, _, _),) = stored_records(fleet, "P-070")
    assert (columns["kind"].value, columns["notes"]) == ("as_found", "after the shock test")


def test_the_help_states_the_grouping_rule(capsys) -> None:
    assert cli_history.GROUPING == GROUPING
    code, out, _ = run(capsys, "import-history", "--help")
    assert code == 0 and "Sessions: the rows of one session are those with the same" in out
    code, out, _ = run(capsys, "--help")
    assert "import-history" in out


def test_no_progress_bar_off_a_terminal_and_one_on_it(capsys, fleet, tmp_path, monkeypatch):
    path = write_csv(tmp_path / "p.csv", rows_of("P-080", WHEN[0], 1))
    _, out, _ = run(capsys, "import-history", path, "--db", fleet)
    assert len(out.strip().splitlines()) == 1  # the summary line alone
    monkeypatch.setattr("sys.stdout.isatty", lambda: True, raising=False)
    path = write_csv(tmp_path / "q.csv", rows_of("P-081", WHEN[0], 1))
    _, out, _ = run(capsys, "import-history", path, "--db", fleet)
    assert "1/1" in out and len(out.strip().splitlines()) > 1


def test_the_api_imports_a_history_for_technicians_only(client, fleet, technician, viewer):
    text = io.StringIO()
    rows = [*rows_of("P-090", WHEN[0], 1), ["P-091", POT, WHEN[0], "tess", "jig J-1", "x", "1"]]
    csv.writer(text).writerows([HEADER, *rows])
    files = {"file": ("lab-history.csv", text.getvalue().encode(), "text/csv")}
    assert client.post("/api/v1/history", files=files).status_code == 401
    refused = client.post("/api/v1/history", files=files, headers=viewer)
    assert refused.status_code == 403
    assert counts(fleet)["sessions"] == 0
    r = client.post("/api/v1/history", files=files, headers=technician)
    assert r.status_code == 200, r.text
    body = r.json()
    assert (body["stored"], body["rejected"], body["units_created"]) == (1, 1, ["P-090"])
    assert body["problems"] == [
        {
            "line": 13,
            "session_lines": "13",
            "serial": "P-091",
            "performed_at": WHEN[0],
            "reason": "reference_value 'x' is not a number",
        }
    ]
    assert body["summary"].startswith("lab-history.csv: 12 rows, 2 sessions: 1 stored")
    bad = {"file": ("x.csv", b"serial,reading\nA,1\n", "text/csv")}
    r = client.post("/api/v1/history", files=bad, headers=technician)
    assert r.status_code == 422 and r.json()["field"] == "file"
    assert "missing sensor_type, performed_at" in r.json()["detail"]


def test_reading_groups_without_a_database() -> None:
    text = "Serial;Sensor Type;performed_at;operator;reference;reference_value;reading\n" + (
        "A-1;T;2021-01-01;ann;J;1,5;2\n"  # ';' separated: "1,5" is not a number here
        "A-1;T;2021-01-01;ann;J;2;3\n"
        "\n"
        "a-1;T;2021-01-01T00:00Z;ann;J;3;4\n"
    )
    parsed = read_history(io.StringIO(text, newline=""))
    assert parsed.rows == 3
    (only,) = parsed.sessions
    assert only.lines == [2, 3, 5] and only.line_span() == "2-3, 5"
    assert only.problems == [(2, "reference_value '1,5' is not a number")]
