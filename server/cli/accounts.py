"""`sensorledger user add` and `sensorledger token create`: people and API tokens."""

from __future__ import annotations

import argparse
import getpass
import shlex
import sys
from datetime import date
from typing import TYPE_CHECKING

from server.cli.common import (
    EXIT_OK,
    NAME_MAX,
    ROLES,
    db_hint,
    db_option,
    open_session,
    recorded_by,
)

if TYPE_CHECKING:
    pass

# -- user add ------------------------------------------------------------------------------------


def _check_name(name: str, what: str) -> str:
    from server.errors import Invalid

    name = name.strip()
    if len(name) > NAME_MAX:
        raise Invalid(f"{what} has at most {NAME_MAX} characters; this one has {len(name)}")
    return name


def _read_password(option: str | None, name: str) -> str:
    """From --password, from standard input (``-``), or asked twice without echo."""
    from server.errors import Invalid

    if option == "-":
        return sys.stdin.readline().rstrip("\r\n")
    if option is not None:
        return option
    try:
        first = getpass.getpass(f"Password for {name}: ")
        second = getpass.getpass("The same password again: ")
    except EOFError:
        raise Invalid(
            "no password was given; use --password - to pass it on standard input"
        ) from None
    if first != second:
        raise Invalid("the two passwords differ; no user was created")
    return first


def _user_add(args: argparse.Namespace) -> int:
    from server.accounts import people
    from server.accounts import service as accounts
    from server.accounts.models import Role

    name = _check_name(args.name, "a user name")
    password = _read_password(args.password, name)
    with open_session(args) as session:
        user = accounts.create_user(session, name, Role(args.role))
        accounts.set_password(session, user, password)
        people.created_user(session, recorded_by(), user)
        session.commit()
        print(
            f"Created user {user.name} ({user.role.value}); they can sign in with this "
            f"password at the address `sensorledger serve` shows."
        )
        print(
            f"For scripts, create an API token: sensorledger token create {user.name}"
            f"{db_hint(args)}"
        )
    return EXIT_OK


def _configure_user_add(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("name", metavar="NAME", help="the user name to sign in with")
    parser.add_argument(
        "--role",
        required=True,
        choices=ROLES,
        help="viewer: reads; technician: also calibrates; admin: everything",
    )
    parser.add_argument(
        "--password",
        metavar="PW",
        help="the password (at least 4 characters); '-' reads it from standard "
        "input; without it you are asked twice (safer: a password on the "
        "command line stays in the shell history)",
    )
    db_option(parser)


# -- token create --------------------------------------------------------------------------------


def _token_create(args: argparse.Namespace) -> int:
    from server.accounts import people
    from server.accounts import service as accounts
    from server.errors import Conflict, NotFound

    label = _check_name(args.label or f"created {date.today():%Y-%m-%d}", "a token label")
    with open_session(args) as session:
        try:
            user = accounts.get_user(session, args.name.strip())
        except NotFound as exc:
            raise NotFound(
                f"{exc.message}; create the user first with: sensorledger user add "
                f"{shlex.quote(args.name.strip())} --role technician"
                f"{db_hint(args)}"
            ) from None
        if user.disabled_at is not None:
            raise Conflict(f"{user.name} is disabled; enable them first: sensorledger user enable")
        raw = accounts.create_token(session, user, label)
        people.created_token(session, recorded_by(), user, label)
        session.commit()
        print(f'New API token "{label}" for {user.name} ({user.role.value}).')
    print("It is shown only this once (only its hash is stored): keep it somewhere safe.")
    print("Scripts send it with every request as the header  Authorization: Bearer <token>")
    print(raw)
    return EXIT_OK


def _configure_token_create(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("name", metavar="NAME", help="the user the token acts as")
    parser.add_argument(
        "--label",
        metavar="TEXT",
        help="what the token is for, e.g. 'bench PC 2' (default: today's date)",
    )
    db_option(parser)
