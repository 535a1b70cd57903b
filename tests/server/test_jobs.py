"""Jobs as database rows, claimed by several runners at once (two engines on one database stand
for two server processes; SQLite and PostgreSQL): every job runs exactly once, two jobs of one
sensor type never run at the same time, and a writer that cannot get SQLite's write lock in time
gets a 503 with Retry-After, never a 500."""

from __future__ import annotations

import itertools
import threading
import time
from collections import Counter
from typing import Any

import pytest
import sqlalchemy as sa

from server.app import create_app
from server.config import Settings
from server.db import make_engine, make_sessionmaker
from server.fleet.models import SensorType
from server.jobs import service as jobs
from server.jobs.models import Job, JobKind, JobState
from server.jobs.runner import JobContext, JobRunner
from tests.server.lines import line_points, pot_type

N_JOBS = 24
TIMEOUT_S = 120


def _types(factory: Any, n: int) -> list[int]:
    with factory() as s:
        made = [
            SensorType(
                name=f"T{i}",
                quantity="angle",
                value_unit="deg",
                reading_unit="counts",
                reading_min=0,
                reading_max=1023,
                families=["line"],
                family_options={},
                interval_days=365,
                tur=4.0,
            )
            for i in range(n)
        ]
        s.add_all(made)
        s.commit()
        return [t.id for t in made]


def test_two_runners_run_every_job_once_and_one_job_per_type_at_a_time(app, db_url):
    app.state.jobs.shutdown()  # this app's own runner stays out of it
    engines = [make_engine(db_url) for _ in range(2)]
    factories = [make_sessionmaker(e) for e in engines]
    readers = [make_sessionmaker(e, read_only=True) for e in engines]
    type_ids = _types(factories[0], 3)
    with factories[0]() as s:
        ids = [
            jobs.enqueue(s, JobKind.fleet, f"job {i}", sensor_type_id=type_ids[i % 3]).id
            for i in range(N_JOBS)
        ]
        s.commit()

    runs: Counter[int] = Counter()
    spans: list[tuple[int, float, float, str]] = []
    lock = threading.Lock()

    def handler(name: str) -> Any:
        def run(ctx: JobContext) -> None:
            with readers[0]() as s:
                type_id = jobs.get_job(s, ctx.job_id).sensor_type_id
            start = time.monotonic()
            time.sleep(0.02)
            with ctx.factory() as s:
                job = ctx.hold(s)
                jobs.finish(job, name)
                end = time.monotonic()  # before the commit frees the type for the next job
                s.commit()
            with lock:
                runs[ctx.job_id] += 1
                assert type_id is not None
                spans.append((type_id, start, end, name))

        return run

    runners = [
        JobRunner(f, r, {JobKind.fleet: handler(f"runner {i}")}, poll_s=0.02)
        for i, (f, r) in enumerate(zip(factories, readers, strict=True))
    ]
    for runner in runners:
        runner.start()
    try:
        runners[0].wait(TIMEOUT_S)
    finally:
        for runner in runners:
            runner.shutdown()
        for e in engines:
            e.dispose()

    assert runs == Counter({i: 1 for i in ids})
    with app.state.sessionmaker() as s:
        states = s.execute(sa.select(Job.state, Job.attempts).where(Job.id.in_(ids))).all()
    assert all(state is JobState.done and attempts == 1 for state, attempts in states)
    for type_id in type_ids:
        mine = sorted((a, b) for t, a, b, _ in spans if t == type_id)
        for (_, end), (start, _) in itertools.pairwise(mine):
            assert start >= end, "two jobs of one type overlapped"


def test_a_writer_kept_from_the_lock_gets_503_and_nothing_is_stored(sqlite_url, tmp_path):
    app = create_app(Settings(database_url=sqlite_url, sqlite_busy_timeout_ms=300))
    from fastapi.testclient import TestClient

    from server.accounts import service as accounts
    from server.accounts.models import Role

    with app.state.sessionmaker() as s:
        user = accounts.create_user(s, "tina", Role.admin, password="tina-pw")
        headers = {"Authorization": f"Bearer {accounts.create_token(s, user, 'tests')}"}
        s.commit()
    with TestClient(app) as client:
        assert (
            client.post("/api/v1/sensor-types", json=pot_type("P"), headers=headers).status_code
            == 201
        )
        r = client.post("/api/v1/units", json={"serial": "U1", "sensor_type": "P"}, headers=headers)
        assert r.status_code == 201, r.text
        app.state.jobs.wait(TIMEOUT_S)
        hog = sa.create_engine(sqlite_url, connect_args={"isolation_level": None})
        with hog.connect() as conn:
            conn.exec_driver_sql("BEGIN IMMEDIATE")  # another writer holds the lock
            r = client.post(
                "/api/v1/units/U1/calibrations",
                json={
                    "performed_at": "2026-11-01T10:00:00Z",
                    "operator": "tina",
                    "reference": "jig",
                    "kind": "incoming",
                    "points": line_points(1),
                },
                headers=headers,
            )
            conn.exec_driver_sql("ROLLBACK")
        hog.dispose()
        assert r.status_code == 503, r.text
        assert r.headers["Retry-After"].isdigit()
        assert "try again" in r.json()["detail"]
        listed = client.get("/api/v1/units/U1/calibrations", headers=headers).json()
        assert listed["total"] == 0


@pytest.mark.parametrize("attempts, state", [(1, JobState.queued), (3, JobState.failed)])
def test_a_silent_running_job_is_taken_back(app, attempts, state):
    app.state.jobs.shutdown()
    factory = app.state.sessionmaker
    with factory() as s:
        job = jobs.enqueue(s, JobKind.overdue_sweep, "x")
        s.commit()
        job_id = job.id
    claimed = jobs.claim(factory, "gone:1")
    assert claimed is not None
    with factory() as s:
        s.execute(sa.update(Job).where(Job.id == job_id).values(attempts=attempts))
        s.commit()
    assert jobs.recover(factory, stale_after_s=3600) == 0  # its heartbeat is fresh: left alone
    time.sleep(0.05)
    assert jobs.recover(factory, stale_after_s=0.01) == 1
    with factory() as s:
        job = s.get(Job, job_id)
        assert job is not None and job.state is state and job.claim_token is None
    with pytest.raises(jobs.JobLost), factory() as s:  # the old claimer can no longer finish it
        jobs.hold(s, job_id, claimed[1])
