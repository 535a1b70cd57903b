"""`sensorledger db upgrade` and `sensorledger backup`: the schema and a safe copy of a SQLite
file."""

from __future__ import annotations

import argparse
import math
import os
import shlex
import sys
from collections.abc import Callable
from datetime import UTC, date, datetime
from pathlib import Path
from typing import TYPE_CHECKING

from server.cli.common import (
    EXIT_ENVIRONMENT,
    EXIT_OK,
    db_option,
    describe_database,
    first_line,
    open_engine,
    require_existing,
    revision_of,
    url_of,
)

if TYPE_CHECKING:
    from sqlalchemy.engine import URL


# -- db upgrade ----------------------------------------------------------------------------------


def _db_upgrade(args: argparse.Namespace) -> int:
    from alembic.script import ScriptDirectory

    from server.migrate import alembic_config, upgrade

    url = url_of(args)
    engine = open_engine(url)
    try:
        before = revision_of(engine)
        upgrade(engine)
        after = revision_of(engine)
    finally:
        engine.dispose()
    head = ScriptDirectory.from_config(alembic_config()).get_current_head()
    newest = " (the newest)" if after == head else ""
    where = describe_database(url)
    if before == after:
        print(f"{where}: already at revision {after}{newest}; nothing to do.")
    else:
        print(
            f"{where}: upgraded from {before or 'an empty database'} to revision {after}{newest}."
        )
    return EXIT_OK


# -- backup --------------------------------------------------------------------------------------

STEP_PAGES = 1024  # pages copied per step at least (4 MiB at SQLite's default page size)
PROGRESS_LINES = 20  # a large database reports its progress about this many times
COUNTED = (  # tables read back from the copy, and what their rows are
    ("sensor_type", "sensor types"),
    ("unit", "units"),
    ("calibration_session", "calibration sessions"),
    ("user_account", "users"),
)


def pg_dump_command(url: URL, path: str) -> str:
    """The pg_dump command line that backs up the PostgreSQL database at ``url`` (no password)."""
    words = ["pg_dump", "--format=custom", f"--file={path}"]
    if url.host:
        words.append(f"--host={url.host}")
    if url.port:
        words.append(f"--port={url.port}")
    if url.username:
        words.append(f"--username={url.username}")
    words.append(str(url.database or ""))
    return shlex.join(w for w in words if w)


def _size(n: int) -> str:
    """Bytes for people: 812 bytes, 41.0 kB, 3.2 MB (powers of 1000)."""
    if n < 1000:
        return f"{n} bytes"
    x = float(n)
    for unit in ("kB", "MB", "GB"):
        x /= 1000
        if x < 999.95:
            return f"{x:.1f} {unit}"
    return f"{x / 1000:.1f} TB"


def copy_sqlite(
    source: Path,
    target: Path,
    *,
    busy_timeout_s: float = 5.0,
    on_step: Callable[[int, int], None] | None = None,
) -> tuple[int, datetime]:
    """Copy the SQLite database ``source`` into the new file ``target`` with SQLite's online
    backup; returns the pages copied and when the snapshot was taken (UTC).

    The copy is one consistent snapshot: the source connection holds a read transaction for the
    whole copy, so writers on other connections (a running server) neither restart the copy
    nor show up half-done in it; with WAL they are not blocked either. ``on_step(done, total)``
    is called after every step. The copy is left in rollback-journal mode: a single file.
    """
    import sqlite3

    src = sqlite3.connect(
        f"{source.resolve().as_uri()}?mode=rw", uri=True, timeout=busy_timeout_s,
        isolation_level=None,
    )  # fmt: skip
    try:
        src.execute("BEGIN")
        src.execute("SELECT count(*) FROM sqlite_master").fetchone()  # the snapshot starts here
        taken = datetime.now(UTC)
        total = int(src.execute("PRAGMA page_count").fetchone()[0])
        dst = sqlite3.connect(target, isolation_level=None)
        try:

            def progress(_status: int, remaining: int, pages: int) -> None:
                if on_step is not None:
                    on_step(pages - remaining, pages)

            step = max(STEP_PAGES, math.ceil(total / PROGRESS_LINES))
            src.backup(dst, pages=step, progress=progress)
            dst.execute("PRAGMA journal_mode=DELETE").fetchone()
        finally:
            dst.close()
        src.execute("COMMIT")
    finally:
        src.close()
    return total, taken


def read_back(path: Path) -> dict[str, int | None]:
    """Row counts of the tables in ``COUNTED`` read from the database at ``path`` opened
    read-only (None for a table it lacks); raises sqlite3.DatabaseError when it is damaged."""
    import sqlite3

    conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    try:
        check = conn.execute("PRAGMA quick_check").fetchone()[0]
        if check != "ok":
            raise sqlite3.DatabaseError(f"the copy fails its integrity check: {check}")
        tables = {name for (name,) in conn.execute("SELECT name FROM sqlite_master")}
        return {
            table: (
                int(conn.execute(f'SELECT count(*) FROM "{table}"').fetchone()[0])
                if table in tables
                else None
            )
            for table, _ in COUNTED
        }
    finally:
        conn.close()


def _backup_source(args: argparse.Namespace) -> Path:
    """The SQLite file to back up; any other database is a mistake, explained."""
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    from server.errors import Invalid

    url = url_of(args)
    try:
        parsed = make_url(url)
    except ArgumentError:
        raise Invalid(f"--db: cannot read the database URL {url!r}", field="db") from None
    backend = parsed.get_backend_name()
    if backend == "postgresql":
        raise Invalid(
            f"sensorledger backs up SQLite files only; back up this PostgreSQL database with "
            f"pg_dump: {pg_dump_command(parsed, args.path)} (pg_dump asks for the password, or "
            f"reads it from PGPASSWORD or ~/.pgpass; restore with pg_restore)",
            field="db",
        )
    if backend != "sqlite":
        raise Invalid(
            f"sensorledger backs up SQLite files only; use the backup tool of the {backend} "
            f"database {parsed.render_as_string(hide_password=True)}",
            field="db",
        )
    if parsed.database in (None, "", ":memory:"):
        raise Invalid("an in-memory database has nothing to back up; give --db a file", field="db")
    require_existing(url)
    return Path(str(parsed.database)).expanduser().resolve()


def _backup(args: argparse.Namespace) -> int:
    import sqlite3
    import tempfile

    from server.config import Settings
    from server.errors import Invalid

    source = _backup_source(args)
    target = Path(args.path).expanduser().resolve()
    if target == source or (target.exists() and target.samefile(source)):
        raise Invalid(f"{args.path} is the database itself; give another file", field="path")
    if target.is_dir():
        raise Invalid(
            f"{args.path} is a folder; give the backup's file name, e.g. "
            f"{Path(args.path) / f'sensorledger-{date.today():%Y-%m-%d}.db'}",
            field="path",
        )
    if target.exists() and not args.force:
        raise Invalid(
            f"{args.path} exists already; give another name, or --force to replace it",
            field="path",
        )
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        handle, name = tempfile.mkstemp(
            dir=target.parent, prefix=f".{target.name}.", suffix=".partial"
        )
        os.close(handle)
    except OSError as exc:
        raise Invalid(
            f"cannot write in {target.parent}: {exc.strerror or exc}", field="path"
        ) from None
    partial = Path(name)  # empty, readable by its owner only (the copy holds password hashes)
    print(f"Backing up {source} (SQLite) to {target}", flush=True)

    def progress(done: int, total: int) -> None:
        if total > STEP_PAGES:  # one step is the whole file: nothing worth reporting
            print(f"  copied {done} of {total} pages ({100 * done // total} %)", flush=True)

    try:
        pages, taken = copy_sqlite(
            source,
            partial,
            busy_timeout_s=Settings().sqlite_busy_timeout_ms / 1000,
            on_step=progress,
        )
        counts = read_back(partial)
        if target.exists() and not args.force:  # appeared while copying
            raise Invalid(f"{args.path} appeared while copying; nothing was replaced", field="path")
        os.replace(partial, target)
    except sqlite3.Error as exc:
        print(f"error: cannot back up {source}: {first_line(exc)}", file=sys.stderr)
        return EXIT_ENVIRONMENT
    except OSError as exc:
        print(f"error: cannot write {target}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_ENVIRONMENT
    finally:
        for suffix in ("", "-journal", "-wal", "-shm"):
            Path(f"{partial}{suffix}").unlink(missing_ok=True)
    size = target.stat().st_size
    print(
        f"Wrote {target}: {_size(size)} ({pages} pages), the database as it was at "
        f"{taken:%Y-%m-%d %H:%M:%S} UTC."
    )
    found = [f"{counts[table]} {what}" for table, what in COUNTED if counts[table] is not None]
    if found:
        print(f"The copy opens and reads back: {', '.join(found)}.")
    else:
        print("The copy opens, but holds no sensorledger tables (an empty database).")
    print(
        f"To restore it: stop the server, delete {source.name}-wal and {source.name}-shm if "
        f"they are there,\nthen copy the backup over {source}."
    )
    return EXIT_OK


def _configure_backup(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "path", metavar="PATH", help="the file to write the copy to (a new file: see --force)"
    )
    parser.add_argument(
        "--force",
        action="store_true",
        help="replace PATH if it exists (only once the copy is whole)",
    )
    db_option(parser)
