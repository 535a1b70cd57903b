"""`sensorledger user list|passwd|role|disable|enable|unlock` and `sensorledger token
list|revoke`: managing people and tokens (the same service as /admin/people; every change is in
the audit log, the actor being ``command line (<OS user>)``)."""

from __future__ import annotations

import argparse
from collections.abc import Sequence
from datetime import datetime

from server.cli.accounts import _read_password
from server.cli.common import EXIT_OK, ROLES, db_option, open_session, recorded_by


def _when(moment: datetime | None) -> str:
    return "—" if moment is None else f"{moment:%Y-%m-%d %H:%M}"


def print_table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> None:
    widths = [max(len(str(c)) for c in column) for column in zip(header, *rows, strict=True)]
    for row in (header, *rows):
        print("  ".join(str(c).ljust(w) for c, w in zip(row, widths, strict=True)).rstrip())


# -- user list -----------------------------------------------------------------------------------


def _user_list(args: argparse.Namespace) -> int:
    from server.accounts import people
    from server.db import utcnow

    now = utcnow()
    with open_session(args) as session:
        found = people.list_people(session)
        rows = []
        for p in found:
            lock = p.lock
            failed = "—"
            if lock is not None:
                failed = f"{lock.failures}"
                if lock.locked_until is not None and lock.locked_until > now:
                    failed += f", locked until {lock.locked_until:%H:%M:%S} UTC"
            rows.append(
                [
                    p.user.name,
                    p.user.role.value,
                    "disabled" if p.user.disabled_at else "enabled",
                    str(p.api_tokens),
                    str(p.sessions),
                    _when(p.last_seen),
                    failed,
                ]
            )
    if not rows:
        print("No users yet: sensorledger user add NAME --role admin")
        return EXIT_OK
    print_table(
        ["user", "role", "status", "api tokens", "signed in", "last seen (UTC)", "failed sign-ins"],
        rows,
    )
    return EXIT_OK


# -- user passwd / role / disable / enable / unlock ------------------------------------------------


def _user_passwd(args: argparse.Namespace) -> int:
    from server.accounts import people, service

    with open_session(args) as session:
        user = service.get_user(session, args.name.strip())
        password = _read_password(args.password, user.name)
        ended = people.set_password(session, recorded_by(), user.name, password)
        session.commit()
    print(f"New password for {user.name}; {ended} browser sign-in(s) ended, API tokens kept.")
    return EXIT_OK


def _user_role(args: argparse.Namespace) -> int:
    from server.accounts import people
    from server.accounts.models import Role

    with open_session(args) as session:
        user = people.set_role(session, recorded_by(), args.name.strip(), Role(args.role))
        session.commit()
    print(f"{user.name} is now {user.role.value} (from their next request on).")
    return EXIT_OK


def _user_disable(args: argparse.Namespace) -> int:
    from server.accounts import people

    with open_session(args) as session:
        ended = people.disable(session, recorded_by(), args.name.strip())
        session.commit()
    print(
        f"{args.name.strip()} is disabled: they cannot sign in, and {ended} token(s) and "
        "sign-in(s) of theirs stopped working now."
    )
    return EXIT_OK


def _user_enable(args: argparse.Namespace) -> int:
    from server.accounts import people

    with open_session(args) as session:
        user = people.enable(session, recorded_by(), args.name.strip())
        session.commit()
    print(
        f"{user.name} may sign in again; their old tokens stay revoked "
        f"(sensorledger token create {user.name} for a new one)."
    )
    return EXIT_OK


def _user_unlock(args: argparse.Namespace) -> int:
    from server.accounts import people
    from server.accounts.models import ThrottleKind

    kind, key = (
        (ThrottleKind.address, args.address) if args.address else (ThrottleKind.user, args.name)
    )
    if not key:
        from server.errors import Invalid

        raise Invalid("give a user NAME or --address ADDRESS")
    with open_session(args) as session:
        people.unlock(session, recorded_by(), kind, key)
        session.commit()
    print(f"Failed sign-ins of the {kind.value} {key.strip()} cleared; it may sign in now.")
    return EXIT_OK


def _name(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("name", metavar="NAME", help="the user name")


def _configure_user_list(parser: argparse.ArgumentParser) -> None:
    db_option(parser)


def _configure_user_passwd(parser: argparse.ArgumentParser) -> None:
    _name(parser)
    parser.add_argument(
        "--password",
        metavar="PW",
        help="the new password (at least 4 characters); '-' reads it from standard input; "
        "without it you are asked twice",
    )
    db_option(parser)


def _configure_user_role(parser: argparse.ArgumentParser) -> None:
    _name(parser)
    parser.add_argument("role", metavar="ROLE", choices=ROLES, help=" | ".join(ROLES))
    db_option(parser)


def _configure_user_name(parser: argparse.ArgumentParser) -> None:
    _name(parser)
    db_option(parser)


def _configure_user_unlock(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("name", metavar="NAME", nargs="?", help="the user name to clear")
    parser.add_argument("--address", metavar="IP", help="clear an address instead")
    db_option(parser)


# -- token list / revoke ---------------------------------------------------------------------------


def _token_list(args: argparse.Namespace) -> int:
    from server.accounts import people
    from server.db import utcnow

    now = utcnow()
    with open_session(args) as session:
        tokens = people.list_tokens(session, user=args.user, include_ended=args.all)
        rows = [
            [
                str(t.id),
                t.user.name,
                "api" if t.kind.value == "api" else "browser",
                t.name,
                _when(t.created_at),
                _when(t.last_used_at),
                _when(t.expires_at),
                people.token_state(t, now),
            ]
            for t in tokens
        ]
    if not rows:
        print("No tokens" + ("" if args.all else " in use (--all shows revoked ones too)") + ".")
        return EXIT_OK
    print_table(
        ["id", "user", "kind", "label", "created (UTC)", "last used", "expires", "state"], rows
    )
    return EXIT_OK


def _token_revoke(args: argparse.Namespace) -> int:
    from server.accounts import people

    with open_session(args) as session:
        revoked = [people.revoke(session, recorded_by(), token_id) for token_id in args.ids]
        session.commit()
    for token in revoked:
        print(f"Revoked token {token.id} ({token.name!r}) of {token.user.name}.")
    return EXIT_OK


def _configure_token_list(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--user", metavar="NAME", help="only this user's tokens")
    parser.add_argument(
        "--all", action="store_true", help="also revoked and expired tokens (default: usable)"
    )
    db_option(parser)


def _configure_token_revoke(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "ids", metavar="ID", type=int, nargs="+", help="token ids, as `token list` shows"
    )
    db_option(parser)
