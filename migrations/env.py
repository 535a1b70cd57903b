"""Alembic environment: configured from pyproject.toml ([tool.alembic]) or by server.migrate."""

from __future__ import annotations

from alembic import context
from sqlalchemy import Connection

from server.config import Settings
from server.db import make_engine
from server.models import Base

config = context.config
target_metadata = Base.metadata


def _configure(connection: Connection | None = None, url: str | None = None) -> None:
    context.configure(
        connection=connection,
        url=url,
        target_metadata=target_metadata,
        render_as_batch=True,
        compare_type=True,
    )


def _url() -> str:
    """The URL handed in by server.migrate, else SENSORLEDGER_DATABASE_URL / the default file."""
    return str(config.attributes.get("url") or Settings().database_url)


def run_offline() -> None:
    _configure(url=_url())
    with context.begin_transaction():
        context.run_migrations()


def run_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _configure(connection=connection)
        with context.begin_transaction():
            context.run_migrations()
        return
    engine = make_engine(_url())
    with engine.connect() as conn:
        _configure(connection=conn)
        with context.begin_transaction():
            context.run_migrations()
    engine.dispose()


if context.is_offline_mode():
    run_offline()
else:
    run_online()
