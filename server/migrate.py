"""Bring a database to the newest schema with Alembic (used on start and by `db upgrade`)."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from sqlalchemy import Engine, text

from server.db import writer

MIGRATE_LOCK = 7_340_022  # PostgreSQL advisory lock key: one process migrates at a time

MIGRATIONS = Path(__file__).resolve().parent.parent / "migrations"


def alembic_config(url: str | None = None) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    if url:
        cfg.attributes["url"] = url
    return cfg


def upgrade(engine: Engine) -> None:
    """Upgrade the database behind ``engine`` to head, in one transaction. Several processes
    starting at once take turns (SQLite's write lock, a PostgreSQL advisory lock): the first
    upgrades, the others find the schema at head."""
    cfg = alembic_config()
    with writer(engine).begin() as conn:
        if conn.dialect.name == "postgresql":
            conn.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": MIGRATE_LOCK})
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "head")
