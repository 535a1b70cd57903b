"""The port, the keyboard and the screen of `sensorledger capture` (``server/cli/capture.py``):
whole lines from a serial port (pyserial), confirmations from standard input (keys one by one on
a terminal), and the display (rich's live view on a terminal, one line per event otherwise).
Standard library only at load."""

from __future__ import annotations

import os
import queue
import select
import threading
import time
from dataclasses import dataclass, field
from typing import IO, Any, Protocol

from server.cli.common import EXIT_ENVIRONMENT, first_line
from server.cli.sampling import Collector, PointStats, Settings


class Stop(Exception):
    """The capture cannot go on or end well: a message and an exit status."""

    def __init__(self, message: str, code: int) -> None:
        super().__init__(message)
        self.message, self.code = message, code


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
