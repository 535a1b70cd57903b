"""`sensorledger capture` end to end: the command runs as a process reading a simulated unit on a
pseudo-terminal (Python's pty module) that prints noisy 12-bit readings with garbage lines and
spikes, and posts to a real server (uvicorn on a SQLite file) or writes a file.

The simulated unit (common practice, no source): a potentiometer read as value = 0.1 x counts,
so at reference v the true reading is 10 v counts; Gaussian noise of SD 3 counts, printed as
whole counts; line i is garbage when i % 10 == 3 and a spike of +600 counts when i % 25 == 7
(never both). Each point takes --count 40 samples. Tolerance: every point's mean within 4 of its
standard errors of the truth (seeded noise; which lines fall into a point depends on timing, so
4 SE, a 6e-5 chance per point of a false alarm, rather than 2)."""

from __future__ import annotations

import contextlib
import csv
import math
import os
import pty
import queue
import re
import signal
import subprocess
import sys
import threading
import time
import tty
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from server.accounts import service as accounts
from server.accounts.models import Role
from server.app import create_app
from server.calibrations.models import CalibrationSession, Point
from server.config import Settings
from server.db import make_engine, make_sessionmaker
from tests.liveserver import answers, free_port, start_uvicorn
from tests.server.lines import pot_type

ROOT = Path(__file__).resolve().parents[2]
SERIAL = "POT-C01"
SIGMA = 3.0
COUNT = 40
WAIT_S = 60  # a generous limit on waiting for the command, never an assertion on time
GARBAGE = ("ERR timeout", "adc: ", "#### reset ####", "\x00\x7f??")


class Device:
    """A unit on a pseudo-terminal printing ``adc: N`` about 500 times a second."""

    def __init__(self, seed: int, fmt: str = "adc: {r}") -> None:
        self.master, self.slave = pty.openpty()
        tty.setraw(self.slave)  # no echo: what the unit prints never comes back to it
        os.set_blocking(self.master, False)
        self.path = os.ttyname(self.slave)
        self.rng = np.random.default_rng(seed)
        self.fmt = fmt
        self.truth = 0.0
        self.stopping = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def move(self, reference_value: float) -> None:
        self.truth = 10.0 * reference_value

    def _run(self) -> None:
        i = 0
        while not self.stopping.is_set():
            if i % 10 == 3:
                line = GARBAGE[(i // 10) % len(GARBAGE)]
            else:
                r = round(self.truth + self.rng.normal(0, SIGMA)) + (600 if i % 25 == 7 else 0)
                line = self.fmt.format(r=r, i=i, mv=r * 0.8)
            with contextlib.suppress(OSError):  # nobody reading: lost, as on a real port
                os.write(self.master, (line + "\r\n").encode("latin-1"))
            i += 1
            time.sleep(0.002)

    def close(self) -> None:
        if self.stopping.is_set():
            return
        self.stopping.set()
        self.thread.join(timeout=5)
        os.close(self.master)
        os.close(self.slave)


class Run:
    """The command as a process; its standard output read line by line by a thread."""

    def __init__(self, args: list[str], cwd: Path) -> None:
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "server.cli", "capture", *args],
            cwd=cwd,
            env={**os.environ, "PYTHONPATH": str(ROOT)},
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        self.out: queue.Queue[str | None] = queue.Queue()
        self.seen: list[str] = []
        threading.Thread(target=self._pump, daemon=True).start()

    def _pump(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.out.put(line.rstrip("\n"))
        self.out.put(None)

    def expect(self, pattern: str) -> re.Match[str]:
        deadline = time.monotonic() + WAIT_S
        while time.monotonic() < deadline:
            try:
                line = self.out.get(timeout=1)
            except queue.Empty:
                continue
            if line is None:
                break
            self.seen.append(line)
            found = re.search(pattern, line)
            if found:
                return found
        said = ""
        if self.proc.poll() is not None and self.proc.stderr is not None:
            said = f"\nexited {self.proc.returncode}; stderr:\n{self.proc.stderr.read()[-3000:]}"
        raise AssertionError(
            f"no line like {pattern!r}; output so far:\n" + "\n".join(self.seen) + said
        )

    def send(self, text: str) -> None:
        assert self.proc.stdin is not None
        self.proc.stdin.write(text)
        self.proc.stdin.flush()

    def finish(self) -> tuple[int, str]:
        assert self.proc.stdin is not None
        self.proc.stdin.close()
        code = self.proc.wait(timeout=WAIT_S)
        assert self.proc.stderr is not None
        while self.out.get(timeout=WAIT_S) is not None:
            pass
        return code, self.proc.stderr.read()


def take_points(run: Run, device: Device, steps: list[tuple[float, str]]) -> list[dict[str, Any]]:
    """Move the target for each step, confirm it (the line given), and read the point's report."""
    found = []
    for k, (truth, line) in enumerate(steps, start=1):
        run.expect(r"place the target at reference")
        device.move(truth)
        time.sleep(0.1)  # the old position's lines already sent are dropped at Enter anyway
        run.send(line + "\n")
        m = run.expect(
            rf"point {k} of \d+ taken: reference (\S+): reading \S+ \(sd \S+, n (\d+), "
            rf"rejected (\d+), (\d+) line\(s\) without a reading\)"
        )
        found.append(
            {
                "reference_value": float(m.group(1)),
                "n": int(m.group(2)),
                "rejected": int(m.group(3)),
                "garbage": int(m.group(4)),
                "truth": 10.0 * truth,
            }
        )
    return found


def read_csv(path: Path) -> list[dict[str, float]]:
    with path.open() as handle:
        reader = csv.DictReader(handle)
        assert reader.fieldnames == ["reference_value", "reading", "sd", "n", "rejected"]
        return [{k: float(v) for k, v in row.items()} for row in reader]


def check_points(reports: list[dict[str, Any]], rows: list[dict[str, float]]) -> None:
    """Each point: its mean within 4 SE of the truth; the 40 lines' garbage and spikes counted
    and left out (a contiguous run of L lines holds floor or ceil of L/10 garbage lines)."""
    assert len(rows) == len(reports)
    for report, row in zip(reports, rows, strict=True):
        assert row["reference_value"] == report["reference_value"]
        assert row["n"] + row["rejected"] == COUNT
        assert (row["n"], row["rejected"]) == (report["n"], report["rejected"])
        lines = COUNT + report["garbage"]
        assert math.floor(lines / 10) <= report["garbage"] <= math.ceil(lines / 10)
        assert row["rejected"] >= math.floor(lines / 25)  # at least the spikes among them
        se = row["sd"] / math.sqrt(row["n"])
        assert abs(row["reading"] - report["truth"]) <= 4 * se, (row, report)
        assert 0.5 * SIGMA <= row["sd"] <= 1.6 * SIGMA  # no +600 spike kept


@pytest.fixture
def device() -> Iterator[Device]:
    d = Device(seed=11)
    yield d
    d.close()


class Live:
    """A real server (uvicorn) on a SQLite file with a pot type, one unit and a technician."""

    def __init__(self, tmp_path: Path) -> None:
        self.url = f"sqlite:///{tmp_path / 'capture.db'}"
        app = create_app(Settings(database_url=self.url))
        with TestClient(app) as client:
            with app.state.sessionmaker() as session:
                admin = accounts.create_user(session, "ada", Role.admin, password="ada-pw-1")
                tech = accounts.create_user(session, "tom", Role.technician, password="tom-pw-1")
                admin_token = accounts.create_token(session, admin, "tests")
                self.token = accounts.create_token(session, tech, "bench")
                session.commit()
            headers = {"Authorization": f"Bearer {admin_token}"}
            assert (
                client.post(
                    "/api/v1/sensor-types", json=pot_type("bench pot"), headers=headers
                ).status_code
                == 201
            )
            r = client.post(
                "/api/v1/units",
                json={"serial": SERIAL, "sensor_type": "bench pot"},
                headers=headers,
            )
            assert r.status_code == 201
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.log = tmp_path / "server.log"
        self.proc: subprocess.Popen[bytes] | None = None
        self.start()

    def start(self) -> None:
        self.proc = start_uvicorn(self.url, self.port, self.log)
        deadline = time.monotonic() + WAIT_S
        while not answers(f"{self.base}/signin"):
            assert self.proc.poll() is None and time.monotonic() < deadline, self.log.read_text()
            time.sleep(0.1)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            self.proc.wait(timeout=30)

    def sessions(self) -> int:
        engine = make_engine(self.url)
        try:
            with make_sessionmaker(engine)() as session:
                return int(
                    session.scalar(select(func.count()).select_from(CalibrationSession)) or 0
                )
        finally:
            engine.dispose()


@pytest.fixture
def live(tmp_path: Path) -> Iterator[Live]:
    server = Live(tmp_path)
    yield server
    server.stop()


def server_args(live: Live, device: Device, plan: str, *extra: str) -> list[str]:
    return [
        "--port",
        device.path,
        "--unit",
        SERIAL,
        "--plan",
        plan,
        "--count",
        str(COUNT),
        "--server",
        live.base,
        "--token",
        live.token,
        "--operator",
        "tom",
        "--reference",
        "angle jig AJ-1",
        *extra,
    ]


def test_capture_posts_what_it_captured(live: Live, device: Device, tmp_path: Path) -> None:
    kept = tmp_path / "kept.csv"
    run = Run(server_args(live, device, "10,30,50,70,90", "--keep", str(kept)), tmp_path)
    # the third Enter carries 40 (a value in place of the planned 50); 70 is taken twice
    steps = [(10, ""), (30, ""), (40, "40"), (70, ""), (70, "70")]
    reports = take_points(run, device, steps)
    run.expect(r"preview of POT-C01 \(bench pot\), 5 points: nothing is stored yet")
    run.expect(r"decision\s+PASSED")
    assert live.sessions() == 0  # the preview stores nothing
    run.expect(r"save this calibration\? \[y/N\]")
    run.send("y\n")
    stored = run.expect(r"stored calibration session (\d+) of POT-C01: PASSED")
    code, err = run.finish()
    assert code == 0, err
    rows = read_csv(kept)
    check_points(reports, rows)
    assert [r["reference_value"] for r in rows] == [10, 30, 40, 70, 70]
    client_headers = {"Authorization": f"Bearer {live.token}"}
    import json
    import urllib.request

    request = urllib.request.Request(
        f"{live.base}/api/v1/units/{SERIAL}/calibrations/{stored.group(1)}", headers=client_headers
    )
    with urllib.request.urlopen(request, timeout=30) as answer:
        doc = json.loads(answer.read())
    assert [
        (p["reference_value"], p["reading"], p["sd"], p["n"], p["rejected"]) for p in doc["points"]
    ] == [(r["reference_value"], r["reading"], r["sd"], r["n"], r["rejected"]) for r in rows]
    assert [p["repeat_index"] for p in doc["points"]] == [0, 0, 0, 0, 1]
    assert (doc["operator"], doc["reference"]) == ("tom", "angle jig AJ-1")
    assert "(sd, n, rejected): 10: " in doc["notes"]
    assert live.sessions() == 1


def test_lost_connection_keeps_the_points_for_import(
    live: Live, device: Device, tmp_path: Path
) -> None:
    kept = tmp_path / "points-kept.csv"
    run = Run(server_args(live, device, "20,60,90", "--keep", str(kept)), tmp_path)
    take_points(run, device, [(20, ""), (60, ""), (90, "")])
    run.expect(r"save this calibration\?")
    live.stop()  # the server goes away between the preview and the save
    run.send("y\n")
    code, err = run.finish()
    assert code == 1
    assert "the connection to" in err and "was lost while saving" in err
    assert f"kept in {kept}" in err and f"sensorledger import {kept} --unit {SERIAL}" in err
    assert live.sessions() == 0
    rows = read_csv(kept)
    assert [r["reference_value"] for r in rows] == [20, 60, 90]
    # the kept file is what `sensorledger import` reads
    imported = subprocess.run(
        [
            sys.executable,
            "-m",
            "server.cli",
            "import",
            str(kept),
            "--unit",
            SERIAL,
            "--operator",
            "tom",
            "--reference",
            "angle jig AJ-1",
            "--db",
            live.url,
        ],
        cwd=ROOT,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        capture_output=True,
        text=True,
    )
    assert imported.returncode == 0, imported.stderr
    assert live.sessions() == 1
    engine = make_engine(live.url)
    try:
        with make_sessionmaker(engine)() as session:
            stored = session.execute(
                select(
                    Point.reading, Point.sample_sd, Point.sample_n, Point.sample_rejected
                ).order_by(Point.seq)
            ).all()
    finally:
        engine.dispose()
    assert [tuple(x) for x in stored] == [
        (r["reading"], r["sd"], r["n"], r["rejected"]) for r in rows
    ]


def test_ctrl_c_posts_nothing(live: Live, device: Device, tmp_path: Path) -> None:
    run = Run(server_args(live, device, "10,30,50"), tmp_path)
    take_points(run, device, [(10, ""), (30, "")])
    run.expect(r"place the target at reference 50")
    run.proc.send_signal(signal.SIGINT)
    code, err = run.finish()
    assert code == 130
    assert "interrupted: nothing posted; the 2 points taken are kept in capture-POT-C01-" in err
    assert live.sessions() == 0
    files = list(tmp_path.glob("capture-POT-C01-*.csv"))
    assert len(files) == 1 and len(read_csv(files[0])) == 2


def test_offline_file_with_a_pattern(tmp_path: Path) -> None:
    d = Device(seed=5, fmt="t={i} raw={r} mv={mv:.1f}")  # the last number is not the reading
    try:
        out = tmp_path / "points.csv"
        run = Run(
            [
                "--port",
                d.path,
                "--unit",
                SERIAL,
                "--plan",
                "15,45,85",
                "--count",
                str(COUNT),
                "--pattern",
                r"raw=(-?\d+)",
                "--offline",
                str(out),
            ],
            tmp_path,
        )
        reports = take_points(run, d, [(15, ""), (45, ""), (85, "")])
        run.expect(r"captured 3 points, \d+ line\(s\) without a reading")
        run.expect(rf"wrote {re.escape(str(out))}")
        code, err = run.finish()
        assert code == 0, err
        check_points(reports, read_csv(out))
    finally:
        d.close()


def test_mistakes_are_named_before_the_port_is_opened(tmp_path: Path) -> None:
    cases = [
        (["--plan", "10"], "--plan needs at least two"),
        (["--plan", "10,20", "--pattern", "raw=("], "--pattern"),
        (["--plan", "10,20"], "give --offline FILE or --server URL"),
        (["--plan", "10,20", "--server", "http://127.0.0.1:9"], "--server needs --token"),
        (["--plan", "10,20", "--offline", "x.csv", "--count", "1"], "--count must be at least 3"),
    ]
    for extra, message in cases:
        done = subprocess.run(
            [
                sys.executable,
                "-m",
                "server.cli",
                "capture",
                "--port",
                "/dev/null-none",
                "--unit",
                SERIAL,
                *extra,
            ],
            cwd=tmp_path,
            env={**os.environ, "PYTHONPATH": str(ROOT), "SENSORLEDGER_TOKEN": ""},
            capture_output=True,
            text=True,
            stdin=subprocess.DEVNULL,
        )
        assert done.returncode == 2, (extra, done.stderr)
        assert message in done.stderr


def test_live_display_shows_reading_stability_and_progress() -> None:
    from rich.console import Console

    from server.cli.capture_terminal import State, render
    from server.cli.sampling import PointStats, Settings

    state = State(unit=SERIAL, port="/dev/ttyACM0", plan=[10.0, 30.0, 50.0], step=1)
    state.points.append(PointStats(10.0, 100.25, 2.9, 39, 1, 4))
    state.reading, state.spread, state.garbage, state.typed = 301.0, 4.2, 7, "3"
    console = Console(record=True, width=100, force_terminal=False)
    console.print(render(state, Settings(threshold=2.0)))
    text = console.export_text()
    assert "reading  301" in text
    assert "settling: sd 4.2 > 2" in text
    assert "1/3 points" in text
    assert "Place the target at 30 and press Enter" in text and "3_" in text
    assert "100.25" in text and "7 line(s) without a reading" in text


def test_unplugged_unit_keeps_the_points_taken(device: Device, tmp_path: Path) -> None:
    out = tmp_path / "never.csv"
    run = Run(
        [
            "--port",
            device.path,
            "--unit",
            SERIAL,
            "--plan",
            "10,30,50",
            "--count",
            str(COUNT),
            "--offline",
            str(out),
        ],
        tmp_path,
    )
    take_points(run, device, [(10, "")])
    run.expect(r"place the target at reference 30")
    device.close()  # the cable pulled: the port reports an error
    code, err = run.finish()
    assert code == 1, err
    assert f"the port {device.path} stopped answering" in err and "nothing posted" in err
    assert not out.exists()
    files = list(tmp_path.glob("capture-POT-C01-*.csv"))
    assert len(files) == 1 and [r["reference_value"] for r in read_csv(files[0])] == [10]


def test_by_hand_on_a_terminal(device: Device, tmp_path: Path) -> None:
    """stdin and stdout a terminal: keys read one by one (a typed value replaces the planned
    one), rich's live display, and the terminal's mode given back at the end."""
    import termios

    master, slave = pty.openpty()
    before = termios.tcgetattr(slave)
    out = tmp_path / "by-hand.csv"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "server.cli",
            "capture",
            "--port",
            device.path,
            "--unit",
            SERIAL,
            "--plan",
            "10,30,50",
            "--count",
            str(COUNT),
            "--offline",
            str(out),
        ],
        cwd=tmp_path,
        env={
            **os.environ,
            "PYTHONPATH": str(ROOT),
            "TERM": "xterm-256color",
            "COLUMNS": "100",
            "LINES": "40",
        },
        stdin=slave,
        stdout=slave,
        stderr=slave,
    )
    screen: list[str] = []

    def pump() -> None:
        while True:
            try:
                chunk = os.read(master, 4096)
            except OSError:
                return
            if not chunk:
                return
            screen.append(chunk.decode("utf-8", "replace"))

    reader = threading.Thread(target=pump, daemon=True)
    reader.start()

    def wait_for(text: str) -> None:
        deadline = time.monotonic() + WAIT_S
        while text not in "".join(screen):
            assert proc.poll() is None or text in "".join(screen), "".join(screen)[-3000:]
            assert time.monotonic() < deadline, (
                f"no {text!r} on screen:\n" + "".join(screen)[-3000:]
            )
            time.sleep(0.05)

    try:
        wait_for("Place the target at ")
        wait_for("0/3 points")
        for k, (truth, keys) in enumerate([(10, "\r"), (45, "45\r"), (50, "\r")], start=1):
            device.move(truth)
            time.sleep(0.1)
            os.write(master, keys.encode())
            wait_for(f"{k}/3 points")
        assert proc.wait(timeout=WAIT_S) == 0, "".join(screen)[-3000:]
        wait_for("wrote ")
        assert "reading" in "".join(screen) and "garbage" in "".join(screen)
        rows = read_csv(out)
        assert [r["reference_value"] for r in rows] == [10, 45, 50]
        for row, truth in zip(rows, (100, 450, 500), strict=True):
            assert abs(row["reading"] - truth) <= 4 * row["sd"] / math.sqrt(row["n"])
        after = termios.tcgetattr(slave)
        assert after[3] & termios.ECHO and after[3] & termios.ICANON  # given back
        assert after[3] == before[3]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        os.close(master)
        os.close(slave)
