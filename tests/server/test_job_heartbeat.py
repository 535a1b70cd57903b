"""Jobs: a job that works longer than the stale limit without writing progress is not taken
over by a second process while its own process is alive (its heartbeat comes often enough),
however short the limit is set (SENSORLEDGER_JOB_STALE_AFTER_S). SQLite and PostgreSQL."""

from __future__ import annotations

import time

from server.db import make_engine, make_sessionmaker
from server.jobs import service as jobs
from server.jobs.models import Job, JobKind, JobState
from server.jobs.runner import JobContext, JobRunner
from server.migrate import upgrade

STALE_S = 1.0
WORK_S = 3.0  # three stale limits of work with no progress written


def test_a_long_quiet_job_runs_once(db_url: str) -> None:
    engine = make_engine(db_url)
    upgrade(engine)
    factory, read = make_sessionmaker(engine), make_sessionmaker(engine, read_only=True)
    runs: list[str] = []

    def slow(ctx: JobContext) -> None:
        runs.append(ctx.token)
        deadline = time.monotonic() + WORK_S
        while time.monotonic() < deadline:
            ctx.stopping()
            time.sleep(0.05)
        with ctx.factory() as s:
            jobs.finish(ctx.hold(s))
            s.commit()

    runners = [
        JobRunner(factory, read, {JobKind.overdue_sweep: slow}, poll_s=0.1, stale_after_s=STALE_S)
        for _ in range(2)
    ]
    try:
        with factory() as s:
            job_id = jobs.enqueue(s, JobKind.overdue_sweep, "a long quiet job").id
            s.commit()
        for runner in runners:
            runner.start()
        runners[0].wait(timeout=60)
    finally:
        for runner in runners:
            runner.shutdown()
    with read() as s:
        job = s.get(Job, job_id)
        assert job is not None
        assert (job.state, job.attempts, len(runs)) == (JobState.done, 1, 1), job.message
    engine.dispose()
