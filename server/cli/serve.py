"""`sensorledger serve`: run the web app on this machine."""

from __future__ import annotations

import argparse
import errno
import socket
import sys
from typing import TYPE_CHECKING

from server.cli.common import (
    EXIT_ENVIRONMENT,
    EXIT_OK,
    app_version,
    db_hint,
    db_option,
    describe_database,
    open_engine,
    url_of,
)

if TYPE_CHECKING:
    from sqlalchemy.orm import Session


# -- serve ---------------------------------------------------------------------------------------


def _port(text: str) -> int:
    try:
        port = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a port number") from None
    if not 1 <= port <= 65535:
        raise argparse.ArgumentTypeError(f"{port} is not a port number (1-65535)")
    return port


def port_problem(host: str, port: int) -> str | None:
    """Why the server could not listen on ``host:port``, or None when it can (bind and let go).

    The probe binds the way uvicorn will (SO_REUSEADDR), so it fails only where uvicorn would.
    """
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            probe.bind((host, port))
        except socket.gaierror as exc:
            return f"cannot listen on {host!r}: {exc.strerror}; give --host an address or name"
        except OSError as exc:
            if exc.errno == errno.EADDRINUSE:
                return (
                    f"port {port} on {host} is already in use (is sensorledger already "
                    f"running?); stop that program or choose another port with --port"
                )
            if exc.errno == errno.EACCES:
                return (
                    f"no permission to listen on port {port} (ports below 1024 need "
                    f"administrator rights); choose another port with --port"
                )
            if exc.errno == errno.EADDRNOTAVAIL:
                return f"{host} is not an address of this machine; check --host"
            return f"cannot listen on {host}:{port}: {exc.strerror}"
    return None


def _browser_address(host: str, port: int) -> str:
    if host in ("0.0.0.0", ""):
        host = "127.0.0.1"
    elif host == "::":
        host = "::1"
    return f"http://[{host}]:{port}/" if ":" in host else f"http://{host}:{port}/"


def _sign_in_lines(session: Session, args: argparse.Namespace, demo_users: bool) -> list[str]:
    from sqlalchemy import func, select

    from server.accounts.models import User
    from server.demo import ADMIN, DEMO_PASSWORD, TECHNICIAN

    if demo_users:
        return [
            f'Sign in as user "{ADMIN}" with password "{DEMO_PASSWORD}" (an admin; '
            f'"{TECHNICIAN}" / "{DEMO_PASSWORD}" is a technician).',
            "These accounts exist only in the demo data; do not use them for real records.",
        ]
    users = session.scalar(select(func.count()).select_from(User)) or 0
    if users == 0:
        return [
            "No user exists yet. To sign in, first create an admin (in another terminal):",
            f"    sensorledger user add NAME --role admin{db_hint(args)}",
        ]
    return [
        "Sign in with your user name and password. Add people with:",
        f"    sensorledger user add NAME --role viewer|technician|admin{db_hint(args)}",
    ]


def _serve(args: argparse.Namespace) -> int:
    import uvicorn
    from sqlalchemy import select

    from server.accounts import service as accounts
    from server.accounts.models import User
    from server.app import create_app
    from server.config import Settings
    from server.demo import ADMIN, DEMO_PASSWORD, fleet_size, load_demo

    problem = port_problem(args.host, args.port)
    if problem:
        print(f"error: {problem}", file=sys.stderr)
        return EXIT_ENVIRONMENT
    url = url_of(args)
    open_engine(url).dispose()  # a mistyped URL is reported before anything starts
    app = create_app(Settings(database_url=url))  # upgrades the database to the newest schema
    lines = [f"sensorledger {app_version()}", f"Database: {describe_database(url)}"]
    with app.state.sessionmaker() as session:
        demo_users = False
        if args.demo:
            types, units = fleet_size(session)
            if types or units:
                lines.append(
                    f"The database already holds {types} sensor type(s) and {units} "
                    f"unit(s), so the demo fleet was not loaded (it only goes into an "
                    f"empty database)."
                )
            else:
                summary = load_demo(session)
                session.commit()
                lines += summary.describe()
            found = session.scalar(select(User).where(User.name == ADMIN))
            demo_users = found is not None and accounts.check_password(
                DEMO_PASSWORD, found.password_hash
            )
        address = _browser_address(args.host, args.port)
        lines += ["", f"Open {address} in a browser."]
        if args.host in ("0.0.0.0", "::"):
            lines.append(
                f"Listening on every network: other machines use this machine's name or "
                f"address, port {args.port}."
            )
        lines += _sign_in_lines(session, args, demo_users)
    token_for = ADMIN if demo_users else "NAME"
    lines += [
        f"API reference: {address}docs (scripts need a token: sensorledger token create "
        f"{token_for}{db_hint(args)})",
        "Press Ctrl+C to stop.",
    ]
    print("\n".join(lines), flush=True)
    uvicorn.run(app, host=args.host, port=args.port, log_level="warning")
    print("sensorledger stopped.")
    return EXIT_OK


def _configure_serve(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--demo",
        action="store_true",
        help="fill an empty database with an invented demo fleet first",
    )
    db_option(parser)
    parser.add_argument(
        "--host",
        default="127.0.0.1",
        help="address to listen on (default 127.0.0.1: this machine only; "
        "0.0.0.0 for every network)",
    )
    parser.add_argument("--port", type=_port, default=8000, help="port (default 8000)")
