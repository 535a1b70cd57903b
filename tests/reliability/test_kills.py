"""SIGKILL of the server in the middle of work (SQLite and PostgreSQL): the database stays sound,
every session is wholly there or wholly absent, nothing acknowledged is lost, and a job the
server was running is taken back after restart and finished (or failed with the old fits kept).
A history import (``sensorledger import-history``, a process of its own) killed half-way keeps
the batches it committed, each whole; running the same file again stores the rest once.
"""

from __future__ import annotations

import csv
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from urllib.parse import quote

import pytest
import sqlalchemy as sa

from tests.reliability.checks import (
    check_acknowledged,
    check_fleet_flags,
    check_sessions_whole,
    current_fit_ids,
    database,
    integrity_ok,
    stored_sessions,
    wait_for_fleet,
)
from tests.reliability.fleet import points_of, pot_type, seed_fleet
from tests.reliability.harness import READINGS, ROOT, T0
from tests.reliability.load import Load, run_load
from tests.reliability.processes import Client, Server, bearer, servers

pytestmark = pytest.mark.reliability
RESTART_ENV = {"SENSORLEDGER_JOB_STALE_AFTER_S": "2"}  # a dead server's job is taken back fast
JOB_WAIT_S = 180.0  # a refit job must be running within, and finished within, this
# a type whose refit ranks three families on each session: 80 units x 5 sessions take a few s
REFIT_TYPE = pot_type(
    "Reliability pot, three families",
    families=["line", "polynomial", "power_offset"],
    family_options={"polynomial": {"degree": 3}},
)


def _job(client: Client, job_id: int) -> dict[str, object]:
    reply = client.request("GET", f"/api/v1/jobs/{job_id}")
    assert reply.status == 200, reply.body[:300]
    data: dict[str, object] = reply.json()
    return data


def _job_row(url: str, job_id: int) -> tuple[str, int]:
    from server.jobs.models import Job

    with database(url) as s:
        job = s.get(Job, job_id)
        assert job is not None
        return job.state.value, job.attempts


def _fits_per_session(url: str) -> dict[int, int]:
    from server.calibrations.models import FitRecord

    with database(url) as s:
        rows = s.execute(sa.select(FitRecord.session_id, sa.func.count()).group_by("session_id"))
        return {sid: n for sid, n in rows}


def test_sigkill_in_the_middle_of_a_refit(
    db_url: str, logs: Path, figures: Callable[[str], None]
) -> None:
    fleet = seed_fleet(db_url, n_units=80, sessions_per_unit=5, type_body=REFIT_TYPE)
    with database(db_url) as s:
        before = current_fit_ids(s)
    server = Server(db_url, logs, "refit")
    with servers(server):
        admin = Client(server.base, bearer(fleet.admin_token))
        reply = admin.request("POST", f"/api/v1/sensor-types/{quote(fleet.type_name)}/refit")
        assert reply.status == 202, reply.body[:300]
        job_id = int(reply.json()["id"])
        deadline = time.monotonic() + JOB_WAIT_S
        while True:
            job = _job(admin, job_id)
            if job["state"] == "running" and int(str(job["done"])) > 0:
                break
            assert job["state"] in ("queued", "running"), job
            assert time.monotonic() < deadline, f"the refit did not get going: {job}"
            time.sleep(0.05)
        admin.close()
        server.kill()
        killed_at = job["done"], job["total"]

    integrity_ok(db_url)
    state, attempts = _job_row(db_url, job_id)
    assert (state, attempts) == ("running", 1), "the refit was not killed half-way"
    with database(db_url) as s:
        assert current_fit_ids(s) == before, "the killed refit changed current fits"
        check_sessions_whole(s)

    server = Server(db_url, logs, "refit-again", **RESTART_ENV)
    with servers(server):
        deadline = time.monotonic() + JOB_WAIT_S
        while (found := _job_row(db_url, job_id))[0] in ("queued", "running"):
            assert time.monotonic() < deadline, f"the refit was not resumed: {found}"
            time.sleep(0.25)
        wait_for_fleet(db_url)
    integrity_ok(db_url)
    state, attempts = found
    with database(db_url) as s:
        after = current_fit_ids(s)
        check_sessions_whole(s)
        check_fleet_flags(s, fleet.type_name)
    if state == "done":
        assert attempts == 2
        assert after.keys() == before.keys()
        assert not set(after.values()) & set(before.values()), "a session kept its old fit"
        assert set(_fits_per_session(db_url).values()) == {2}, "a session was refitted twice"
    else:
        assert state == "failed"
        assert after == before, "the failed refit changed current fits"
    figures(
        f"SIGKILL during a refit ({'PostgreSQL' if 'postgresql' in db_url else 'SQLite'}): "
        f"killed at {killed_at[0]} of {killed_at[1]} sessions; integrity ok, old fits current; "
        f"after restart the job was {state} on attempt {attempts}"
    )


def test_sigkill_in_the_middle_of_saves(
    db_url: str, logs: Path, figures: Callable[[str], None]
) -> None:
    fleet = seed_fleet(db_url, n_units=20)
    server = Server(db_url, logs, "saves")
    load, stop = Load(), threading.Event()
    with servers(server):
        writers = threading.Thread(
            target=run_load,
            args=([server.base], fleet, 120.0),
            kwargs={"readers": 0, "stop": stop, "load": load},
        )
        writers.start()
        try:
            deadline = time.monotonic() + 60
            while len(load.acked) < 30:
                assert writers.is_alive() and time.monotonic() < deadline, load.problems
                time.sleep(0.02)
        finally:
            stop.set()  # no new requests; those on the way are cut by the kill
            server.kill()
            writers.join()
    acked = list(load.acked)
    assert load.server_errors == 0, load.statuses

    integrity_ok(db_url)
    with database(db_url) as s:
        check_acknowledged(s, acked, exactly=False)
        stored = check_sessions_whole(s)
    with servers(Server(db_url, logs, "saves-again", **RESTART_ENV)) as (again,):
        tech = Client(again.base, bearer(fleet.tech_token))
        for ack in acked[:: max(1, len(acked) // 10)]:  # the API finds them too
            reply = tech.request("GET", f"/api/v1/units/{ack.serial}/calibrations/{ack.session_id}")
            assert reply.status == 200, reply.body[:300]
        tech.close()
        wait_for_fleet(db_url)
    integrity_ok(db_url)
    with database(db_url) as s:
        check_acknowledged(s, acked, exactly=False)
        check_sessions_whole(s)
        check_fleet_flags(s, fleet.type_name)
    figures(
        f"SIGKILL during saves ({'PostgreSQL' if 'postgresql' in db_url else 'SQLite'}): "
        f"{len(acked)} acknowledged, {stored} stored whole (the rest were cut before their "
        f"answer), none half-written; all there after restart"
    )


HISTORY_UNITS = 200  # x 3 sessions = 600 sessions: two batches of 300 (history.BATCH)
HISTORY_SESSIONS = 3
HISTORY_WAIT_S = 300.0


def _history_file(path: Path, type_name: str) -> set[tuple[str, object]]:
    """A history CSV of HISTORY_UNITS new units with HISTORY_SESSIONS sessions each; the
    (serial, performed_at) of every session."""
    sessions: set[tuple[str, object]] = set()
    with path.open("w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        columns = "serial,sensor_type,performed_at,operator,reference,reference_value,reading"
        out.writerow(columns.split(","))
        for i in range(HISTORY_UNITS):
            serial = f"HIS-{i:04d}"
            for k in range(HISTORY_SESSIONS):
                when = T0.replace(year=T0.year - HISTORY_SESSIONS + k)
                sessions.add((serial, when))
                for p in points_of(i, 50_000 + 10 * i + k):
                    row = [serial, type_name, when.isoformat(), "archive", "angle jig"]
                    out.writerow([*row, p["reference_value"], p["reading"]])
    return sessions


def _import(url: str, path: Path, log: Path) -> subprocess.Popen[bytes]:
    command = [sys.executable, "-m", "server.cli", "import-history", str(path), "--db", url]
    with log.open("ab") as out:
        return subprocess.Popen(command, cwd=ROOT, stdout=out, stderr=subprocess.STDOUT)


def _stored_count(url: str) -> int:
    from server.calibrations.models import CalibrationSession

    with database(url) as s:
        return s.scalar(sa.select(sa.func.count()).select_from(CalibrationSession)) or 0


def test_sigkill_in_the_middle_of_a_history_import(
    db_url: str, logs: Path, tmp_path: Path, figures: Callable[[str], None]
) -> None:
    fleet = seed_fleet(db_url, n_units=0)
    path = tmp_path / "history.csv"
    expected = _history_file(path, fleet.type_name)
    log = logs / "import-history.log"

    first = _import(db_url, path, log)
    deadline = time.monotonic() + HISTORY_WAIT_S
    try:
        while _stored_count(db_url) == 0:  # the first batch is committed
            assert first.poll() is None, log.read_text()[-2000:]
            assert time.monotonic() < deadline, "the import stored nothing in time"
            time.sleep(0.05)
    finally:
        first.send_signal(signal.SIGKILL)
        first.wait()
    integrity_ok(db_url)
    with database(db_url) as s:
        before = stored_sessions(s)
        whole = check_sessions_whole(s, READINGS.size)
    assert 0 < len(before) < len(expected), "the import was not killed half-way"
    assert set(before) <= expected and max(before.values()) == 1
    assert len(before) % 300 == 0, f"{len(before)} sessions: a batch was not stored whole"

    again = _import(db_url, path, log)
    assert again.wait(HISTORY_WAIT_S) == 0, log.read_text()[-2000:]
    integrity_ok(db_url)
    with database(db_url) as s:
        after = stored_sessions(s)
        check_sessions_whole(s, READINGS.size)
    assert set(after) == expected and set(after.values()) == {1}
    assert "already present" in log.read_text() or len(before) == 0
    figures(
        f"SIGKILL during a history import ({'PostgreSQL' if 'postgresql' in db_url else 'SQLite'}"
        f"): killed with {len(before)} of {len(expected)} sessions stored ({whole} whole, batches "
        f"of 300); the second run stored the other {len(expected) - len(before)}, each once"
    )
