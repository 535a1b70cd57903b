"""The `sensorledger` command: serve the app, upgrade the database, manage users and API tokens,
import a file of points as a calibration or a whole history, capture points from a unit's
serial port, export a unit's calibration, back up the database and restore it, fit a file of
points offline.

Every command but ``fit`` takes ``--db PATH|URL`` (a SQLite file or a SQLAlchemy URL); without it
the database is ``$SENSORLEDGER_DATABASE_URL``, else the SQLite file ``./data/sensorledger.db``.
Each command commits its own transaction. Exit status: 0 done; 1 the machine is in the way (port
taken, database unreachable); 2 a mistake to correct (bad arguments, unknown user, a name already
taken...). Messages for mistakes are one line, ``error: ...``, on standard error; never a traceback.

This module imports only the standard library when it loads: each command imports what it needs
when it runs, so ``--help`` and ``fit`` never load uvicorn or the web app
(``tests/server/test_cli.py`` checks it in a clean interpreter).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable
from dataclasses import dataclass

from server.cli.accounts import (
    _configure_token_create,
    _configure_user_add,
    _token_create,
    _user_add,
)
from server.cli.capture import _capture, _configure_capture
from server.cli.common import (
    EXIT_ENVIRONMENT,
    EXIT_MISTAKE,
    KINDS,
    ROLES,
    app_version,
    db_option,
    describe_database,
    first_line,
    url_of,
)
from server.cli.database import _backup, _configure_backup, _db_upgrade
from server.cli.exports import _configure_export, _export
from server.cli.fitting import _configure_fit, _fit
from server.cli.history import _configure_import_history, _import_history
from server.cli.imports import _configure_import, _import
from server.cli.people import (
    _configure_token_list,
    _configure_token_revoke,
    _configure_user_list,
    _configure_user_name,
    _configure_user_passwd,
    _configure_user_role,
    _configure_user_unlock,
    _token_list,
    _token_revoke,
    _user_disable,
    _user_enable,
    _user_list,
    _user_passwd,
    _user_role,
    _user_unlock,
)
from server.cli.restore import _configure_restore, _restore
from server.cli.serve import _configure_serve, _serve

__all__ = ["COMMANDS", "KINDS", "ROLES", "Command", "build_parser", "main"]

# -- the command table ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Command:
    """One command line verb: ``path`` is ("serve",) or (group, action) like ("user", "add")."""

    path: tuple[str, ...]
    help: str
    configure: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


GROUPS = {
    "db": "the database schema",
    "user": "people who sign in",
    "token": "API tokens for scripts",
}

# One row per command; the parser is built from this table. A new command gets a row here and
# its functions above.
COMMANDS = (
    Command(("serve",), "run the web app (and the API) on this machine", _configure_serve, _serve),
    Command(
        ("db", "upgrade"),
        "bring the database to the newest schema and print its revision",
        db_option,
        _db_upgrade,
    ),
    Command(
        ("user", "add"),
        "create a user who signs in with a password",
        _configure_user_add,
        _user_add,
    ),
    Command(
        ("user", "list"),
        "list users: role, status, tokens, last seen, failed sign-ins",
        _configure_user_list,
        _user_list,
    ),
    Command(
        ("user", "passwd"),
        "set a user's password (their browser sign-ins end)",
        _configure_user_passwd,
        _user_passwd,
    ),
    Command(
        ("user", "role"),
        "change a user's role: viewer, technician or admin",
        _configure_user_role,
        _user_role,
    ),
    Command(
        ("user", "disable"),
        "stop a user signing in; their tokens and sign-ins end now",
        _configure_user_name,
        _user_disable,
    ),
    Command(
        ("user", "enable"), "let a disabled user sign in again", _configure_user_name, _user_enable
    ),
    Command(
        ("user", "unlock"),
        "clear the failed sign-ins of a user name (or an --address)",
        _configure_user_unlock,
        _user_unlock,
    ),
    Command(
        ("token", "create"),
        "create an API token for a user; printed once, on the last line",
        _configure_token_create,
        _token_create,
    ),
    Command(
        ("token", "list"),
        "list tokens: label, created, last used, expiry, state",
        _configure_token_list,
        _token_list,
    ),
    Command(
        ("token", "revoke"),
        "revoke tokens by id (see token list)",
        _configure_token_revoke,
        _token_revoke,
    ),
    Command(
        ("import",),
        "store a calibration session of a unit from a CSV file of points (as the API does)",
        _configure_import,
        _import,
    ),
    Command(
        ("import-history",),
        "store a whole calibration history from one long CSV file (units, sessions, points)",
        _configure_import_history,
        _import_history,
    ),
    Command(
        ("capture",),
        "take a unit's calibration points from its serial port, then post them or write a file",
        _configure_capture,
        _capture,
    ),
    Command(
        ("export",),
        "export a unit's current calibration: conversion table (CSV, JSON) or C header",
        _configure_export,
        _export,
    ),
    Command(
        ("backup",),
        "copy the SQLite database to a file, safely while the server runs",
        _configure_backup,
        _backup,
    ),
    Command(
        ("restore",),
        "restore a backup file into an empty database (SQLite or PostgreSQL)",
        _configure_restore,
        _restore,
    ),
    Command(
        ("fit",),
        "fit points from a CSV file and report (offline: no database, no server)",
        _configure_fit,
        _fit,
    ),
)

EPILOG = """examples:
  sensorledger serve --demo                     try it with an invented fleet
  sensorledger fit points.csv                   rank every family on a file of points
  sensorledger import points.csv --unit IR-0001 --operator tess --reference "jig DJ-2"
  sensorledger import-history history.csv --report rejected.csv
  sensorledger capture --port /dev/ttyACM0 --unit IR-0001 --plan 100,150,200 --offline ir.csv
  sensorledger export IR-0001 --format c --output ir_0001.h
  sensorledger backup backups/sensorledger-2025-06-01.db
  sensorledger restore backups/sensorledger-2025-06-01.db --db new.db
  sensorledger user add ada --role admin        then sign in as ada
  sensorledger token create ada --label "bench PC" | tail -n1
  sensorledger user list                        who may sign in, and who is locked out
  sensorledger token revoke 12                  a token that left the building
"""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="sensorledger",
        description="Calibration records, fitting and hand-off for a fleet of sensors.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"sensorledger {app_version()}")
    parser.set_defaults(run=None, parser=parser)
    top = parser.add_subparsers(title="commands", metavar="COMMAND")
    groups: dict[str, argparse._SubParsersAction[argparse.ArgumentParser]] = {}
    for command in COMMANDS:
        if len(command.path) == 1:
            sub = top.add_parser(command.path[0], help=command.help, description=command.help)
        else:
            group, action = command.path
            if group not in groups:
                group_parser = top.add_parser(group, help=GROUPS[group], description=GROUPS[group])
                group_parser.set_defaults(run=None, parser=group_parser)
                groups[group] = group_parser.add_subparsers(title="actions", metavar="ACTION")
            sub = groups[group].add_parser(action, help=command.help, description=command.help)
        command.configure(sub)
        sub.set_defaults(run=command.run, parser=sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command in ``argv`` (default: the process's arguments); returns the exit status."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, or a usage error already printed
        return exc.code if isinstance(exc.code, int) else EXIT_MISTAKE
    if args.run is None:  # a group without its action, or nothing at all
        args.parser.print_help(sys.stderr)
        return EXIT_MISTAKE
    try:
        return int(args.run(args))
    except KeyboardInterrupt:
        print(file=sys.stderr)
        return 130
    except Exception as exc:
        code = _explain(exc, args)
        if code is None:
            raise  # a bug: the traceback is wanted
        return code


def _explain(exc: Exception, args: argparse.Namespace) -> int | None:
    """One line on standard error and the exit status for a mistake or an unusable database;
    None for anything else (a bug)."""
    from sqlalchemy.exc import DatabaseError, InterfaceError, OperationalError

    from server.errors import DomainError

    if isinstance(exc, DomainError):
        print(f"error: {exc.message}", file=sys.stderr)
        return EXIT_MISTAKE
    if isinstance(exc, OperationalError | InterfaceError) or type(exc) is DatabaseError:
        # unreachable, refused, locked, or not a database at all; a constraint or SQL error
        # (another DatabaseError) is a bug, not the user's database
        print(
            f"error: cannot use the database {describe_database(url_of(args))}: "
            f"{first_line(exc.orig or exc)}",
            file=sys.stderr,
        )
        return EXIT_ENVIRONMENT
    return None
