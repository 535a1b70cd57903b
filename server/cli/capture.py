"""`sensorledger capture`: take a unit's calibration points from its serial port.

The unit prints readings many times a second; at each planned reference value the user places
the target and presses Enter (with standard input not a terminal, each line it gives confirms the
next point; a number on the line replaces the planned value). The samples that follow are taken
until steady, spikes rejected (``server/cli/sampling.py`` does the arithmetic), and the point keeps
their mean, SD, count and rejected count. Then the points go to a CSV file (``--offline``) or to
a server (``--server``: its preview of the fit and decision first, saved on confirmation or with
``--yes``, once, with an Idempotency-Key). Nothing is posted half-way: an interrupted capture or
a server that stops answering leaves the points in a local file for ``sensorledger import``.

This module is the shell: the capture loop, files and the server; ``capture_terminal`` has the
port, keyboard and screen. Standard library only at load.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import sys
import time
import urllib.error
import urllib.request
import uuid
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from server.cli.capture_terminal import (
    EOF,
    Confirmations,
    Lines,
    LiveView,
    PlainView,
    Port,
    State,
    Stop,
    View,
    open_port,
)
from server.cli.common import EXIT_ENVIRONMENT, EXIT_MISTAKE, EXIT_OK, KINDS, first_line
from server.cli.sampling import (
    Collector,
    PointStats,
    Settings,
    Window,
    compile_pattern,
    confirmation,
    csv_rows,
    notes_of,
    parse_plan,
    reading_of,
)

EXIT_INTERRUPTED = 130
POST_ATTEMPTS = 3  # a save that meets a broken connection is tried again, same Idempotency-Key
HTTP_TIMEOUT_S = 30.0


class Unreachable(Exception):
    """The server did not answer (refused, reset, timed out)."""


# -- the capture ---------------------------------------------------------------------------------


@dataclass(slots=True)
class Capture:
    points: list[PointStats]
    garbage: int
    complete: bool


def capture(
    lines: Lines,
    keys: Confirmations,
    plan: Sequence[float],
    settings: Settings,
    view: View,
    state: State,
    pattern: Any = None,
) -> Capture:
    """Read the port until every planned point is taken (or input ends); KeyboardInterrupt
    passes through with ``state.points`` holding what was taken."""
    window = Window(settings.window)
    view.waiting(state)
    while True:
        collector = state.collecting
        for text in lines.read():
            x = reading_of(text, pattern)
            if x is None:
                state.garbage += 1
            else:
                state.reading = x
                window.add(x)
            if collector is not None:
                done = collector.add_line(text, pattern)
                if done is not None:
                    state.points.append(done)
                    state.step += 1
                    state.collecting = collector = None
                    view.taken(state, done)
                    if state.step >= len(plan):
                        return Capture(state.points, state.garbage, complete=True)
                    view.waiting(state)
        state.spread = window.spread(settings.reject_k, settings.spread_floor)
        state.typed = keys.typed
        if state.collecting is None:
            event = keys.poll()
            if event is EOF:
                return Capture(state.points, state.garbage, complete=False)
            if isinstance(event, str):
                try:
                    value = confirmation(event, plan[state.step])
                except ValueError as exc:
                    state.message = str(exc)
                    view.say(str(exc))
                else:
                    state.message = ""
                    lines.flush()  # samples from here on: the target is in place
                    state.collecting = Collector(value, settings)
        view.show(state)


# -- files and the server ------------------------------------------------------------------------


def write_points(path: Path, points: Sequence[PointStats]) -> None:
    """The points as CSV (``reference_value,reading,sd,n,rejected``), whole or not at all."""
    partial = path.with_name(path.name + ".partial")
    partial.write_text("\n".join(csv_rows(points)) + "\n", encoding="utf-8")
    partial.replace(path)


def keep_path(args: argparse.Namespace, started: datetime) -> Path:
    if args.keep:
        return Path(args.keep)
    safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in args.unit)
    return Path(f"capture-{safe}-{started:%Y%m%dT%H%M%SZ}.csv")


class Api:
    """The server's JSON API with a token (urllib: no extra dependency)."""

    def __init__(self, base: str, token: str) -> None:
        self.base = base.rstrip("/") + "/api/v1"
        self.token = token

    def call(
        self, method: str, path: str, body: Any = None, headers: dict[str, str] | None = None
    ) -> tuple[int, Any]:
        data = None if body is None else json.dumps(body).encode()
        request = urllib.request.Request(
            self.base + path,
            data=data,
            method=method,
            headers={
                "Authorization": f"Bearer {self.token}",
                "Accept": "application/json",
                **({"Content-Type": "application/json"} if data is not None else {}),
                **(headers or {}),
            },
        )
        try:
            with urllib.request.urlopen(request, timeout=HTTP_TIMEOUT_S) as answer:
                return answer.status, json.loads(answer.read() or b"null")
        except urllib.error.HTTPError as exc:
            try:
                doc = json.loads(exc.read() or b"null")
            except ValueError:
                doc = None
            return exc.code, doc
        except (urllib.error.URLError, ConnectionError, TimeoutError, OSError) as exc:
            raise Unreachable(first_line(getattr(exc, "reason", exc))) from None


def detail(status: int, doc: Any) -> str:
    if isinstance(doc, dict) and "detail" in doc:
        d = doc["detail"]
        return d if isinstance(d, str) else json.dumps(d)
    return f"HTTP {status}"


def preview_text(doc: dict[str, Any]) -> str:
    d = doc["decision"]
    vu = doc["value_unit"]
    lines = [
        f"preview of {doc['unit']} ({doc['sensor_type']}), {doc['points']} points: nothing is "
        f"stored yet",
        f"  family      {doc['family']}: {doc['formula']}",
        "  constants   "
        + ", ".join(f"{k} = {v:.6g} (u {doc['stderr'][k]:.2g})" for k, v in doc["params"].items()),
        f"  rse         {doc['rse']:.4g} {vu}".rstrip(),
        f"  decision    {'PASSED' if d['passed'] else 'FAILED'}",
        *(f"              - {r}" for r in d["reasons"]),
        f"  rule        {d['rule']}",
        *(f"  excluded    {e}" for e in doc["excluded"]),
        *(f"  suspect     point {s['index'] + 1}: {s['reason']}" for s in doc["suspects"]),
    ]
    return "\n".join(lines)


# -- the command ---------------------------------------------------------------------------------


def _settings(args: argparse.Namespace) -> Settings:
    try:
        return Settings(
            window=args.window,
            count=args.count,
            threshold=args.threshold,
            reject_k=args.reject,
            spread_floor=args.spread_floor,
            max_samples=args.max_samples,
        )
    except ValueError as exc:
        raise Stop(str(exc), EXIT_MISTAKE) from None


def _capture(args: argparse.Namespace) -> int:
    try:
        return _run(args)
    except Stop as stop:
        print(f"error: {stop.message}", file=sys.stderr)
        return stop.code


def _run(args: argparse.Namespace) -> int:
    # every check that needs neither the port nor the server comes first
    try:
        plan = parse_plan(args.plan)
        pattern = compile_pattern(args.pattern)
    except ValueError as exc:
        raise Stop(str(exc), EXIT_MISTAKE) from None
    settings = _settings(args)
    if (args.offline is None) == (args.server is None):
        raise Stop("give --offline FILE or --server URL (with --token)", EXIT_MISTAKE)
    token = args.token or os.environ.get("SENSORLEDGER_TOKEN")
    api: Api | None = None
    if args.server is not None:
        if not token:
            raise Stop("--server needs --token T (or $SENSORLEDGER_TOKEN)", EXIT_MISTAKE)
        api = Api(args.server, token)
        _check_unit(api, args)
    elif Path(args.offline).exists():
        raise Stop(f"--offline: {args.offline} exists already; give a new file", EXIT_MISTAKE)
    started = datetime.now(UTC)
    port = open_port(args.port, args.baud)
    keys = Confirmations(sys.stdin)
    out = sys.stdout
    state = State(unit=args.unit, port=args.port, plan=plan)
    view: View = LiveView(settings, out) if out.isatty() else PlainView(out)
    keys.start()
    try:
        found = capture(Lines(port), keys, plan, settings, view, state, pattern)
    except KeyboardInterrupt:
        return _interrupted(args, started, state.points, view, keys, port)
    except OSError as exc:  # pyserial's SerialException too: the unit unplugged, the port gone
        _close(view, keys, port)
        kept = _keep(args, started, state.points)
        print(
            f"error: the port {args.port} stopped answering ({first_line(exc)}): nothing "
            f"posted{kept}",
            file=sys.stderr,
        )
        return EXIT_ENVIRONMENT
    except BaseException:
        _close(view, keys, port)
        raise
    _close(view, keys, port)
    if not found.complete:
        kept = _keep(args, started, found.points)
        print(
            f"standard input ended after {len(found.points)} of {len(plan)} points: nothing "
            f"posted{kept}",
            file=sys.stderr,
        )
        return EXIT_ENVIRONMENT
    print(f"captured {len(found.points)} points, {found.garbage} line(s) without a reading")
    if args.offline is not None:
        path = Path(args.offline)
        write_points(path, found.points)
        print(
            f"wrote {path} (reference_value,reading,sd,n,rejected); store it with: sensorledger "
            f"import {path} --unit {args.unit} --operator NAME --reference TEXT"
        )
        return EXIT_OK
    assert api is not None
    return _post(api, args, started, found, keys)


def _check_unit(api: Api, args: argparse.Namespace) -> None:
    """The server answers, the token is good and the unit exists, before any point is taken."""
    from urllib.parse import quote

    try:
        status, doc = api.call("GET", f"/units/{quote(args.unit, safe='')}")
    except Unreachable as exc:
        raise Stop(
            f"--server: cannot reach {args.server} ({exc}); capture with --offline FILE and "
            f"import the file later",
            EXIT_ENVIRONMENT,
        ) from None
    if status == 404:
        raise Stop(f"--unit: the server has no unit {args.unit!r}", EXIT_MISTAKE)
    if status in (401, 403):
        raise Stop(f"--token: the server refused it ({detail(status, doc)})", EXIT_MISTAKE)
    if status != 200:
        raise Stop(f"--server: {detail(status, doc)}", EXIT_ENVIRONMENT)


def _keep(args: argparse.Namespace, started: datetime, points: Sequence[PointStats]) -> str:
    """Write the points to the keep file; the words that say where (empty if no points)."""
    if not points:
        return ""
    path = keep_path(args, started)
    write_points(path, points)
    return (
        f"; the {len(points)} points taken are kept in {path} (sensorledger import {path} "
        f"--unit {args.unit} --operator NAME --reference TEXT)"
    )


def _close(view: View, keys: Confirmations, port: Port | None) -> None:
    """Give back the screen, the keyboard (its terminal mode) and the port, whatever happens."""
    for step in (view.close, keys.stop, port.close if port is not None else None):
        if step is not None:
            with contextlib.suppress(Exception):
                step()


def _interrupted(
    args: argparse.Namespace,
    started: datetime,
    points: list[PointStats],
    view: View | None = None,
    keys: Confirmations | None = None,
    port: Port | None = None,
) -> int:
    if view is not None and keys is not None:
        _close(view, keys, port)
    kept = _keep(args, started, points)
    print(f"\ninterrupted: nothing posted{kept}", file=sys.stderr)
    return EXIT_INTERRUPTED


def _post(
    api: Api, args: argparse.Namespace, started: datetime, found: Capture, keys: Confirmations
) -> int:
    from urllib.parse import quote

    body = {
        "performed_at": started.isoformat(),
        "operator": args.operator,
        "reference": args.reference,
        "kind": args.kind,
        "notes": notes_of(found.points, found.garbage),
        "points": [
            {
                "reference_value": p.reference_value,
                "reading": p.reading,
                "sd": p.sd,
                "n": p.n,
                "rejected": p.rejected,
            }
            for p in found.points
        ],
    }
    if args.keep:
        write_points(Path(args.keep), found.points)
    path = f"/units/{quote(args.unit, safe='')}/calibrations"
    try:
        try:
            status, doc = api.call("POST", path + "/preview", body)
        except Unreachable as exc:
            kept = _keep(args, started, found.points)
            print(
                f"error: the server stopped answering ({exc}): nothing posted{kept}",
                file=sys.stderr,
            )
            return EXIT_ENVIRONMENT
        if status != 200:
            kept = _keep(args, started, found.points)
            print(
                f"error: the server refused the points: {detail(status, doc)}{kept}",
                file=sys.stderr,
            )
            return EXIT_MISTAKE
        print(preview_text(doc), flush=True)
        if not args.yes:
            answer = _ask("save this calibration? [y/N] ", keys)
            if answer is None or answer.strip().lower() not in ("y", "yes"):
                kept = _keep(args, started, found.points)
                print(f"not saved: nothing posted{kept}", file=sys.stderr)
                return EXIT_ENVIRONMENT
        key = str(uuid.uuid4())
        for attempt in range(POST_ATTEMPTS):
            try:
                status, doc = api.call("POST", path, body, headers={"Idempotency-Key": key})
                break
            except Unreachable as exc:
                if attempt + 1 == POST_ATTEMPTS:
                    kept = _keep(args, started, found.points)
                    print(
                        f"error: the connection to {args.server} was lost while saving ({exc}); "
                        f"the session may not be stored: look at the unit's page before "
                        f"importing{kept}",
                        file=sys.stderr,
                    )
                    return EXIT_ENVIRONMENT
                time.sleep(1.0 + attempt)
    except KeyboardInterrupt:
        return _interrupted(args, started, found.points)
    if status != 201:
        kept = _keep(args, started, found.points)
        print(f"error: the server did not store it: {detail(status, doc)}{kept}", file=sys.stderr)
        return EXIT_MISTAKE
    verdict = "PASSED" if doc["decision"]["passed"] else "FAILED"
    print(
        f"stored calibration session {doc['id']} of {doc['unit']}: {verdict}; "
        f"{args.server.rstrip('/')}/units/{quote(args.unit, safe='')}"
    )
    return EXIT_OK


def _ask(question: str, keys: Confirmations) -> str | None:
    """A yes/no answer: typed on a terminal, else the next line of standard input."""
    if keys.terminal:
        try:
            return input(question)
        except EOFError:
            return None
    print(question, flush=True)
    return keys.next_line()


def _configure_capture(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--port", required=True, metavar="DEVICE", help="serial port, e.g. /dev/ttyACM0"
    )
    parser.add_argument("--baud", type=int, default=115200, help="baud rate (default 115200)")
    parser.add_argument("--unit", required=True, metavar="SERIAL", help="the unit calibrated")
    parser.add_argument(
        "--plan",
        required=True,
        metavar="V1,V2,...",
        help="reference values in the order they are set, value units (repeats allowed)",
    )
    parser.add_argument(
        "--pattern",
        metavar="REGEX",
        help="where the reading is on a line: the first group of this regular expression "
        "(else its whole match); default: the last number on the line",
    )
    where = parser.add_argument_group("where the points go (one of)")
    where.add_argument(
        "--offline", metavar="FILE", help="write a CSV file for `sensorledger import`"
    )
    where.add_argument(
        "--server", metavar="URL", help="post to a sensorledger server, e.g. http://lab:8000"
    )
    where.add_argument(
        "--token", metavar="T", help="API token for --server (else $SENSORLEDGER_TOKEN)"
    )
    where.add_argument("--yes", action="store_true", help="save after the preview without asking")
    where.add_argument(
        "--keep",
        metavar="FILE",
        help="also keep the points in this CSV file (default: only when they cannot be posted, "
        "as ./capture-SERIAL-TIME.csv)",
    )
    session = parser.add_argument_group("the session (with --server)")
    session.add_argument("--operator", default=_login(), help="who calibrates (default: you)")
    session.add_argument(
        "--reference",
        default="not stated (sensorledger capture)",
        metavar="TEXT",
        help="the reference jig or instrument, e.g. 'rail R-1'",
    )
    session.add_argument("--kind", choices=KINDS, default="periodic", help="default periodic")
    steady = parser.add_argument_group("taking a point")
    steady.add_argument("--window", type=int, default=20, help="samples in the moving window (20)")
    steady.add_argument(
        "--threshold",
        type=float,
        metavar="SD",
        help="a point is taken when the window's SD (spikes left out) is at most this, reading "
        "units; default: the first full window",
    )
    steady.add_argument("--count", type=int, metavar="N", help="take exactly N samples per point")
    steady.add_argument(
        "--reject",
        type=float,
        default=3.5,
        metavar="K",
        help="a sample further than K robust SDs (1.4826 MAD) from the median is a spike (3.5)",
    )
    steady.add_argument(
        "--spread-floor",
        type=float,
        default=0.5,
        metavar="SD",
        help="least robust SD assumed, reading units (0.5: a whole-count reading's MAD is often 0)",
    )
    steady.add_argument(
        "--max-samples",
        type=int,
        default=600,
        metavar="N",
        help="with --threshold, a point not steady after N samples is taken anyway, marked (600)",
    )


def _login() -> str:
    import getpass

    try:
        return getpass.getuser()[:64]
    except (OSError, KeyError):
        return "bench"
