"""Migrations build the schema the models describe, on SQLite and PostgreSQL alike."""

from __future__ import annotations

from datetime import UTC, datetime

import sqlalchemy as sa
from alembic import command
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


def test_rows_from_revision_0001_migrate_with_defaults(db_url):
    """A 0001 database holding a type, a session and a fit upgrades; new NOT NULL columns are
    filled by their server defaults and the new JSON columns stay empty (nothing is refitted)."""
    engine = make_engine(db_url)
    cfg = alembic_config()
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "0001")
        now = datetime(2026, 1, 2, 3, 4, tzinfo=UTC)
        if engine.dialect.name == "sqlite":
            now = now.replace(tzinfo=None)
        conn.execute(
            sa.text(
                "INSERT INTO sensor_type (id, name, quantity, value_unit, reading_unit, "
                "reading_min, reading_max, families, family_options, interval_days, tur, "
                "created_at, tolerance_abs) VALUES (1, 'pot', 'angle', 'deg', 'counts', 0, "
                "4095, '[\"line\"]', '{}', 365, 4, :now, 1)"
            ),
            {"now": now},
        )
        conn.execute(
            sa.text(
                "INSERT INTO unit (id, serial, sensor_type_id, status, created_at) "
                "VALUES (1, 'P-1', 1, 'in_stock', :now)"
            ),
            {"now": now},
        )
        conn.execute(
            sa.text(
                "INSERT INTO calibration_session (id, unit_id, performed_at, operator, "
                "reference, kind, created_at) VALUES (1, 1, :now, 'kim', 'jig', 'incoming', :now)"
            ),
            {"now": now},
        )
        conn.execute(
            sa.text(
                "INSERT INTO fit (id, session_id, family, options, result, decision, passed, "
                "is_current, engine_version, created_at) VALUES (1, 1, 'line', '{}', '{}', "
                "'{}', :yes, :yes, '0.1.0', :now)"
            ),
            {"now": now, "yes": True},
        )
    upgrade(engine)
    with engine.connect() as conn:
        noise, resolution = conn.execute(
            sa.text("SELECT noise_in, reading_resolution FROM sensor_type")
        ).one()
        assert (noise, resolution) == ("value", None)
        k, big_u, extra = conn.execute(
            sa.text("SELECT reference_k, reference_expanded_u, extra_u FROM calibration_session")
        ).one()
        assert (k, big_u, extra) == (2.0, None, None)
        assert conn.execute(sa.text("SELECT ranking, diagnostics FROM fit")).one() == (None, None)
    engine.dispose()
