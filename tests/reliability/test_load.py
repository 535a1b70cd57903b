"""16 writers posting calibration sessions and 4 people reloading the fleet and needs-attention
pages, against real server processes: no 5xx, every acknowledged session stored exactly once
(retries with the same Idempotency-Key, one after the answer and some sent twice at the same
moment, store nothing twice), every stored fit the one its points give, and the fleet comparison
caught up soon after the load stops, with the flags ``shared.fleet.fleet_outliers`` gives."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest

from tests.conftest import fresh_pg_database
from tests.reliability.checks import (
    check_acknowledged,
    check_fleet_flags,
    check_jobs_ran_once,
    check_sessions_whole,
    current_fit_ids,
    database,
    integrity_ok,
    wait_for_fleet,
)
from tests.reliability.fleet import seed_fleet
from tests.reliability.harness import LOAD_SECONDS
from tests.reliability.load import Load, run_load
from tests.reliability.processes import Server, servers

pytestmark = pytest.mark.reliability
N_UNITS = 40


def _check(url: str, load: Load, type_name: str) -> tuple[float, int, int]:
    """The checks after a load; (fleet catch-up s, sessions checked, units flagged)."""
    assert not load.problems, "\n".join(load.problems)
    assert load.server_errors == 0, load.statuses
    assert load.acked, "no session was saved"
    assert load.reads > 0, "no page was read"
    catch_up = wait_for_fleet(url)
    integrity_ok(url)
    with database(url) as s:
        check_acknowledged(s, load.acked, exactly=True)
        current_fit_ids(s)
        checked = check_sessions_whole(s)
        flagged = check_fleet_flags(s, type_name)
        check_jobs_ran_once(s)
    return catch_up, checked, flagged


def test_writers_and_readers_one_server(
    db_url: str, logs: Path, figures: Callable[[str], None]
) -> None:
    fleet = seed_fleet(db_url, n_units=N_UNITS)
    with servers(Server(db_url, logs, "one")) as (server,):
        load = run_load([server.base], fleet, LOAD_SECONDS)
        catch_up, checked, flagged = _check(db_url, load, fleet.type_name)
    engine = "PostgreSQL" if db_url.startswith("postgresql") else "SQLite"
    figures(
        load.summary(f"load, 1 server, {engine}, 16 writers + 4 readers")
        + f"; fleet caught up {catch_up:.1f} s after; {checked} sessions refitted and "
        f"consistent; {flagged} fleet outliers as fleet_outliers gives"
    )


@pytest.mark.postgres
def test_writers_and_readers_two_servers_postgresql(
    logs: Path, figures: Callable[[str], None]
) -> None:
    with fresh_pg_database() as url:
        fleet = seed_fleet(url, n_units=N_UNITS)
        with servers(Server(url, logs, "first"), Server(url, logs, "second")) as running:
            load = run_load([s.base for s in running], fleet, LOAD_SECONDS)
            catch_up, checked, flagged = _check(url, load, fleet.type_name)
        with database(url) as s:
            jobs = check_jobs_ran_once(s)  # again, after both servers stopped
        figures(
            load.summary("load, 2 servers, PostgreSQL, 16 writers + 4 readers")
            + f"; fleet caught up {catch_up:.1f} s after; {checked} sessions consistent; "
            f"{flagged} fleet outliers; {jobs} jobs, each run once"
        )
