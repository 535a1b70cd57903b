"""`sensorledger capture`: take a unit's calibration points from its serial port.

The unit prints readings many times a second; at each planned reference value the user places
the target and presses Enter (with standard input not a terminal, each line it gives confirms the
next point; a number on the line replaces the planned value). The samples that follow are taken
until steady, spikes rejected (``server/cli/sampling.py`` does the arithmetic), and the point keeps
their mean, SD, count and rejected count. Then the points go to a CSV file (``--offline``) or to
a server (``--server``: its preview of the fit and decision first, saved on confirmation or with
``--yes``, once, with an Idempotency-Key). Nothing is posted half-way: an interrupted capture or
a server that stops answering leaves the points in a local file for ``sensorledger import``.

This module is the shell (port, keyboard, screen, network); standard library only at load.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import queue
import select
import sys
import threading
import time
import urllib.error
import urllib.request
import uuid
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import IO, Any, Protocol

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


class Stop(Exception):
    """The capture cannot go on or end well: a message and an exit status."""

    def __init__(self, message: str, code: int) -> None:
        super().__init__(message)
        self.message, self.code = message, code


class Unreachable(Exception):
    """The server did not answer (refused, reset, timed out)."""


# -- the port ------------------------------------------------------------------------------------


class Port(Protocol):
    def read(self, size: int = 1) -> bytes: ...
    def reset_input_buffer(self) -> None: ...
    def close(self) -> None: ...
    @property
    def in_waiting(self) -> int: ...


class Lines:
    """Whole lines from the port; ``flush`` drops what the unit sent before (and the part of a
    line that follows, which may be cut)."""

    def __init__(self, port: Port) -> None:
        self.port = port
        self.buffer = b""
        self.skip_partial = False

    def read(self) -> list[str]:
        chunk = self.port.read(max(1, self.port.in_waiting))
        if not chunk:
            return []
        self.buffer += chunk
        *whole, self.buffer = self.buffer.split(b"\n")
        lines = [w.decode("ascii", "replace").strip() for w in whole]
        if self.skip_partial and lines:
            self.skip_partial = False
            lines = lines[1:]
        return lines

    def flush(self) -> None:
        self.port.reset_input_buffer()
        self.buffer = b""
        self.skip_partial = True


def open_port(device: str, baud: int) -> Port:
    import serial  # type: ignore[import-untyped]

    try:
        port: Port = serial.Serial(device, baud, timeout=0.05)
    except (serial.SerialException, OSError, ValueError) as exc:
        raise Stop(f"--port: cannot open {device}: {first_line(exc)}", EXIT_ENVIRONMENT) from None
    return port


# -- the keyboard (or a script on standard input) ------------------------------------------------

EOF = None


class Confirmations:
    """Lines from standard input, read by a thread: ``poll`` gives a line, ``EOF`` (None) when
    input ended, or False when nothing came yet. On a terminal the keys are read one by one
    (no echo) so the live display can show what is being typed."""

    def __init__(self, stream: IO[str]) -> None:
        self.stream = stream
        self.lines: queue.Queue[str | None] = queue.Queue()
        self.typed = ""
        self.stopping = threading.Event()
        self.terminal = stream.isatty()
        self.saved_mode: Any = None
        self.thread = threading.Thread(target=self._run, daemon=True)

    def start(self) -> None:
        if self.terminal:
            import termios
            import tty

            fd = self.stream.fileno()
            self.saved_mode = termios.tcgetattr(fd)
            tty.setcbreak(fd)  # keys one by one, no echo; Ctrl-C still interrupts
        self.thread.start()

    def stop(self) -> None:
        """Stop reading keys and give the terminal back as it was."""
        self.stopping.set()
        if self.terminal:
            self.thread.join(timeout=1)
            if self.saved_mode is not None:
                import termios

                termios.tcsetattr(self.stream.fileno(), termios.TCSADRAIN, self.saved_mode)
                self.saved_mode = None

    def poll(self) -> str | bool | None:
        try:
            return self.lines.get_nowait()
        except queue.Empty:
            return False

    def next_line(self) -> str | None:
        """The next line (waiting for it), or None at the end of input."""
        return self.lines.get()

    def _run(self) -> None:
        if not self.terminal:
            for line in self.stream:
                self.lines.put(line.rstrip("\r\n"))
            self.lines.put(EOF)
            return
        fd = self.stream.fileno()
        while not self.stopping.is_set():
            ready, _, _ = select.select([fd], [], [], 0.1)
            if not ready:
                continue
            key = os.read(fd, 1).decode("utf-8", "replace")
            if key == "":
                self.lines.put(EOF)
                return
            if key in "\r\n":
                self.lines.put(self.typed)
                self.typed = ""
            elif key in "\x7f\b":
                self.typed = self.typed[:-1]
            elif key == "\x04":  # Ctrl-D
                self.lines.put(EOF)
                return
            elif key.isprintable():
                self.typed += key


# -- the screen ----------------------------------------------------------------------------------


@dataclass(slots=True)
class State:
    """What the display shows."""

    unit: str
    port: str
    plan: list[float]
    step: int = 0
    reading: float | None = None
    spread: float | None = None  # SD of the last window, spikes left out
    collecting: Collector | None = None
    points: list[PointStats] = field(default_factory=list)
    garbage: int = 0
    typed: str = ""
    message: str = ""


class View(Protocol):
    def show(self, state: State) -> None: ...
    def waiting(self, state: State) -> None: ...
    def taken(self, state: State, point: PointStats) -> None: ...
    def say(self, text: str) -> None: ...
    def close(self) -> None: ...


def describe(p: PointStats) -> str:
    return (
        f"reference {p.reference_value:g}: reading {p.reading:.6g} (sd {p.sd:.3g}, n {p.n}, "
        f"rejected {p.rejected}, {p.garbage} line(s) without a reading)"
        + ("" if p.steady else " - never steady: check the setup")
    )


class PlainView:
    """One line per event, for a log or a script reading standard output."""

    def __init__(self, out: IO[str]) -> None:
        self.out = out

    def show(self, state: State) -> None:
        pass

    def waiting(self, state: State) -> None:
        self.say(
            f"place the target at reference {state.plan[state.step]:g} and press Enter "
            f"(point {state.step + 1} of {len(state.plan)}; a number replaces the value)"
        )

    def taken(self, state: State, point: PointStats) -> None:
        self.say(f"point {len(state.points)} of {len(state.plan)} taken: {describe(point)}")

    def say(self, text: str) -> None:
        print(text, file=self.out, flush=True)

    def close(self) -> None:
        pass


class LiveView:
    """rich's live display: the current reading, whether it is steady, the plan's progress and
    the points taken; redrawn a few times a second."""

    def __init__(self, settings: Settings, out: IO[str]) -> None:
        from rich.console import Console
        from rich.live import Live

        self.settings = settings
        self.console = Console(file=out)
        self.live = Live(console=self.console, refresh_per_second=8, transient=False)
        self.live.start()
        self.last = 0.0

    def show(self, state: State) -> None:
        now = time.monotonic()
        if now - self.last >= 0.1:
            self.last = now
            self.live.update(render(state, self.settings))

    def waiting(self, state: State) -> None:
        self.live.update(render(state, self.settings))

    def taken(self, state: State, point: PointStats) -> None:
        self.live.update(render(state, self.settings))

    def say(self, text: str) -> None:
        self.live.console.print(text)

    def close(self) -> None:
        self.live.stop()


def render(state: State, settings: Settings) -> Any:
    """The live display's content for ``state`` (a rich renderable)."""
    from rich.console import Group
    from rich.progress_bar import ProgressBar
    from rich.table import Table
    from rich.text import Text

    head = Table.grid(padding=(0, 2))
    head.add_column(style="bold")
    head.add_column()
    head.add_row("unit", f"{state.unit} on {state.port}")
    head.add_row("reading", "-" if state.reading is None else f"{state.reading:g}")
    c = state.collecting
    if c is not None and settings.count is None and settings.threshold is not None:
        now = "" if state.spread is None else f", sd {state.spread:.3g}"
        stability = Text(
            f"taking samples: {len(c.samples)}{now}, until sd <= {settings.threshold:g} over "
            f"{settings.window}",
            style="yellow",
        )
    elif c is not None:
        stability = Text(f"taking samples {len(c.samples)}/{settings.needed}", style="yellow")
    elif state.spread is None:
        stability = Text("filling the window", style="dim")
    elif settings.threshold is None or state.spread <= settings.threshold:
        limit = "" if settings.threshold is None else f" (limit {settings.threshold:g})"
        style = "green" if settings.threshold is not None else ""
        stability = Text(f"sd {state.spread:.3g} over {settings.window}{limit}", style=style)
    else:
        stability = Text(
            f"settling: sd {state.spread:.3g} > {settings.threshold:g}", style="bold yellow"
        )
    head.add_row("steady", stability)
    head.add_row("garbage", f"{state.garbage} line(s) without a reading")
    done, total = len(state.points), len(state.plan)
    bar = Table.grid(padding=(0, 1))
    bar.add_row(ProgressBar(total=total, completed=done, width=30), f"{done}/{total} points")
    head.add_row("plan", bar)
    points = Table("reference", "reading", "sd", "n", "rejected", box=None, padding=(0, 1))
    for p in state.points[-8:]:
        points.add_row(
            f"{p.reference_value:g}",
            f"{p.reading:.6g}",
            f"{p.sd:.3g}",
            str(p.n),
            str(p.rejected),
            style="" if p.steady else "yellow",
        )
    if state.step < total and c is None:
        prompt = Text.assemble(
            ("Place the target at ", ""),
            (f"{state.plan[state.step]:g}", "bold cyan"),
            (" and press Enter (or type a value, Enter). Ctrl-C abandons: ", ""),
            (state.typed + "_", "bold"),
        )
    elif c is not None:
        prompt = Text(f"hold still: taking the point at {c.reference_value:g}", style="yellow")
    else:
        prompt = Text("plan done")
    parts: list[Any] = [head, points, prompt]
    if state.message:
        parts.append(Text(state.message, style="red"))
    return Group(*parts)


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
