"""`sensorledger serve --workers 2` for real: two worker processes on one port, one SQLite file,
and a job queued through one of them finished by the shared queue."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import sqlalchemy as sa

from server.accounts import service as accounts
from server.accounts.models import Role
from server.db import make_engine, make_sessionmaker
from server.migrate import upgrade
from tests.server.lines import pot_type

ROOT = Path(__file__).resolve().parents[2]
STARTUP_S = 60


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _children(pid: int) -> list[int]:
    found = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        text = (task / "children").read_text().split()
        found += [int(x) for x in text]
    return found


def _get(url: str, token: str) -> tuple[int, dict]:
    request = urllib.request.Request(url, headers={"Authorization": f"Bearer {token}"})
    with urllib.request.urlopen(request, timeout=10) as response:
        return response.status, json.loads(response.read())


def _post(url: str, token: str, body: dict) -> tuple[int, dict]:
    request = urllib.request.Request(
        url,
        data=json.dumps(body).encode(),
        headers={"Authorization": f"Bearer {token}", "Content-Type": "application/json"},
        method="POST",
    )
    with urllib.request.urlopen(request, timeout=30) as response:
        return response.status, json.loads(response.read())


def test_two_workers_serve_one_database_and_share_the_job_queue(tmp_path):
    db = tmp_path / "sensorledger.db"
    engine = make_engine(f"sqlite:///{db}")
    upgrade(engine)
    with make_sessionmaker(engine)() as s:
        user = accounts.create_user(s, "ada", Role.admin, password="ada-pw")
        token = accounts.create_token(s, user, "tests")
        s.commit()
    engine.dispose()
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    log = (tmp_path / "serve.log").open("w")
    command = [sys.executable, "-m", "server.cli", "serve", "--db", str(db), "--port", str(port)]
    command += ["--workers", "2"]
    proc = subprocess.Popen(
        command,
        cwd=ROOT,
        stdout=log,
        stderr=subprocess.STDOUT,
        env={**os.environ, "SENSORLEDGER_JOB_POLL_S": "0.2"},
        start_new_session=True,
    )
    try:
        deadline = time.monotonic() + STARTUP_S
        while True:
            try:
                if _get(f"{base}/api/v1/units", token)[0] == 200:
                    break
            except OSError:
                pass
            assert proc.poll() is None, (tmp_path / "serve.log").read_text()
            assert time.monotonic() < deadline, "the server did not start"
            time.sleep(0.2)
        workers = _children(proc.pid)
        assert len(workers) >= 2, workers  # uvicorn's supervisor and its 2 worker processes
        assert _post(f"{base}/api/v1/sensor-types", token, pot_type("Pot"))[0] == 201
        status, job = _post(f"{base}/api/v1/sensor-types/Pot/refit", token, {})
        assert status in (200, 201, 202), job
        deadline = time.monotonic() + STARTUP_S
        while _get(f"{base}/api/v1/jobs/{job['id']}", token)[1]["state"] != "done":
            assert time.monotonic() < deadline, "the refit job was never run"
            time.sleep(0.2)
        for _ in range(20):
            assert _get(f"{base}/api/v1/units", token)[0] == 200
    finally:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
        log.close()
    check = make_engine(f"sqlite:///{db}")
    with check.connect() as conn:
        assert conn.execute(sa.text("PRAGMA integrity_check")).scalar() == "ok"
        attempts = conn.execute(sa.text("SELECT attempts FROM job")).scalars().all()
    check.dispose()
    assert attempts and all(a == 1 for a in attempts)  # no job ran twice
