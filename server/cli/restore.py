"""`sensorledger restore PATH`: a backup (a SQLite file from `sensorledger backup`) into an empty
database, SQLite or PostgreSQL; a database that holds anything is refused."""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING

from server.cli.common import (
    EXIT_OK,
    db_option,
    describe_database,
    open_engine,
    url_of,
)

if TYPE_CHECKING:
    from sqlalchemy.engine import Connection, Engine

CHUNK = 5000  # rows read and inserted at a time


def rows_in(engine: Engine) -> dict[str, int]:
    """Rows of each sensorledger table the database has (tables it lacks are left out)."""
    from sqlalchemy import func, inspect, select

    from server.models import Base

    present = set(inspect(engine).get_table_names())
    with engine.connect() as conn:
        return {
            table.name: int(conn.scalar(select(func.count()).select_from(table)) or 0)
            for table in Base.metadata.sorted_tables
            if table.name in present
        }


def copy_rows(source: Connection, target: Connection) -> dict[str, int]:
    """Every row of every table, parents before children; returns the rows per table."""
    from sqlalchemy import select

    from server.models import Base

    copied = {}
    for table in Base.metadata.sorted_tables:
        n = 0
        result = source.execution_options(stream_results=True).execute(
            select(table).order_by(*table.primary_key.columns)
        )
        for chunk in result.partitions(CHUNK):
            target.execute(table.insert(), [dict(row._mapping) for row in chunk])
            n += len(chunk)
        copied[table.name] = n
    return copied


def reset_sequences(target: Connection) -> None:
    """PostgreSQL: each id sequence goes on after the highest id restored."""
    from sqlalchemy import text

    from server.models import Base

    for table in Base.metadata.sorted_tables:
        if "id" not in table.c:
            continue
        target.execute(
            text(
                f"SELECT setval(pg_get_serial_sequence('{table.name}', 'id'), "
                f'COALESCE((SELECT max(id) FROM "{table.name}"), 0) + 1, false)'
            )
        )


def _backup_file(path_text: str) -> Path:
    import sqlite3

    from server.cli.database import read_back
    from server.errors import Invalid

    path = Path(path_text).expanduser().resolve()
    if not path.is_file():
        raise Invalid(f"{path_text}: no such file", field="path")
    try:
        counts = read_back(path)
    except sqlite3.DatabaseError as exc:
        raise Invalid(f"{path_text} is not a readable SQLite backup: {exc}", field="path") from None
    if all(v is None for v in counts.values()):
        raise Invalid(f"{path_text} holds no sensorledger tables", field="path")
    return path


def _restore(args: argparse.Namespace) -> int:
    from server.cli.database import copy_sqlite
    from server.db import make_engine, writer
    from server.errors import Conflict
    from server.migrate import upgrade

    backup = _backup_file(args.path)
    url = url_of(args)
    where = describe_database(url)
    engine = open_engine(url)
    try:
        held = {name: n for name, n in rows_in(engine).items() if n}
        if held:
            listed = ", ".join(f"{n} in {name}" for name, n in sorted(held.items()))
            raise Conflict(
                f"{where} is not empty ({listed}); restore only into an empty database "
                "(a new file, or a new PostgreSQL database)",
                field="db",
            )
        with tempfile.TemporaryDirectory(prefix="sensorledger-restore-") as scratch:
            # a private copy of the backup, brought to the newest schema (an older backup's
            # rows go through the same migrations as a served database's)
            copy = Path(scratch) / "backup.db"
            copy_sqlite(backup, copy)
            source = make_engine(f"sqlite:///{copy}")
            try:
                upgrade(source)
                upgrade(engine)
                with source.connect() as src, writer(engine).begin() as dst:
                    copied = copy_rows(src, dst)
                    if engine.dialect.name == "postgresql":
                        reset_sequences(dst)
            finally:
                source.dispose()
    finally:
        engine.dispose()
    print(f"Restored {backup} into {where} (one transaction: all or nothing).")
    print(
        "Rows: "
        + ", ".join(f"{copied[t]} {t}" for t in ("sensor_type", "unit", "calibration_session"))
        + f", {copied['user_account']} users, {sum(copied.values())} in all."
    )
    return EXIT_OK


def _configure_restore(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("path", metavar="PATH", help="a backup made by `sensorledger backup`")
    db_option(parser)
