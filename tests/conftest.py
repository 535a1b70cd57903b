"""Fixtures shared by every suite: isolated databases (SQLite files, PostgreSQL when configured).

PostgreSQL: set SENSORLEDGER_TEST_PG_URL (e.g. postgresql+psycopg://postgres@127.0.0.1:5432/test);
each test gets a database of its own, created and dropped around it. With CI=true a missing
component (PostgreSQL, Chromium) fails the run instead of skipping.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import make_url

IN_CI = os.environ.get("CI", "").lower() in {"1", "true", "yes"}
PG_URL = os.environ.get("SENSORLEDGER_TEST_PG_URL", "")


def missing(reason: str) -> None:
    """Skip locally; fail in CI, where every component must be present."""
    if IN_CI:
        pytest.fail(f"CI=true but {reason}")
    pytest.skip(reason)


@contextmanager
def fresh_pg_database() -> Iterator[str]:
    """A new, empty PostgreSQL database for one test; dropped afterwards."""
    if not PG_URL:
        missing("SENSORLEDGER_TEST_PG_URL is not set")
    admin = sa.create_engine(PG_URL, isolation_level="AUTOCOMMIT")
    name = f"sl_test_{uuid.uuid4().hex[:12]}"
    try:
        with admin.connect() as conn:
            conn.execute(sa.text(f'CREATE DATABASE "{name}"'))
    except sa.exc.OperationalError as exc:
        admin.dispose()
        missing(f"PostgreSQL at {PG_URL} is not reachable: {exc.orig}")
    try:
        yield make_url(PG_URL).set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.execute(sa.text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


@pytest.fixture
def sqlite_url(tmp_path) -> str:
    return f"sqlite:///{tmp_path / 'sensorledger.db'}"


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def db_url(request: pytest.FixtureRequest, tmp_path) -> Iterator[str]:
    """Each test that uses this runs once on a SQLite file and once on PostgreSQL."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'sensorledger.db'}"
    else:
        with fresh_pg_database() as url:
            yield url


FIGURES: list[str] = []  # what simulation tests measured, shown at the end of the run


@pytest.fixture
def figures() -> Callable[[str], None]:
    """Report a measured figure (e.g. a simulated coverage): printed at the end of the run, in
    the "measured figures" section, whether or not output is captured."""

    def report(text: str) -> None:
        FIGURES.append(text.strip("\n"))

    return report


def pytest_terminal_summary(terminalreporter, exitstatus, config) -> None:
    """The measured figures, and how many PostgreSQL and browser tests actually ran (CI logs
    show both)."""
    if FIGURES:
        terminalreporter.section("measured figures")
        for text in FIGURES:
            terminalreporter.write_line(text)
    counts: dict[str, dict[str, int]] = {"postgres": {}, "browser": {}}
    for outcome in ("passed", "failed", "skipped", "error"):
        for report in terminalreporter.stats.get(outcome, []):
            if getattr(report, "when", "call") not in {"call", "setup"}:
                continue
            if outcome == "passed" and report.when != "call":
                continue
            for marker in counts:
                if marker in getattr(report, "keywords", {}):
                    counts[marker][outcome] = counts[marker].get(outcome, 0) + 1
    for marker, by_outcome in counts.items():
        text = ", ".join(f"{n} {k}" for k, n in sorted(by_outcome.items())) or "none collected"
        terminalreporter.write_line(f"{marker} tests: {text}")
