"""Migrations build the schema the models describe, on SQLite and PostgreSQL alike."""

from __future__ import annotations

import sqlalchemy as sa
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory

from server.db import make_engine
from server.migrate import alembic_config, upgrade
from server.models import Base


def test_upgrade_from_empty_matches_the_models(db_url):
    engine = make_engine(db_url)
    upgrade(engine)
    upgrade(engine)  # a second start is a no-op
    with engine.connect() as conn:
        context = MigrationContext.configure(conn, opts={"compare_type": True})
        assert compare_metadata(context, Base.metadata) == []
        head = ScriptDirectory.from_config(alembic_config()).get_current_head()
        assert context.get_current_revision() == head
    engine.dispose()


def test_sqlite_file_runs_in_wal_mode_with_busy_timeout(sqlite_url):
    engine = make_engine(sqlite_url, busy_timeout_ms=4321)
    with engine.connect() as conn:
        assert conn.execute(sa.text("PRAGMA journal_mode")).scalar() == "wal"
        assert conn.execute(sa.text("PRAGMA busy_timeout")).scalar() == 4321
        assert conn.execute(sa.text("PRAGMA foreign_keys")).scalar() == 1
    engine.dispose()
