"""Pages and the unit lookup with a big fleet, served for real, against a bare endpoint.

``run_pages()`` (called by ``python -m tests.bench``; alone: ``python -m tests.bench.pages_bench``)
seeds a SQLite file with 10,000 units of one type and 500 open flags (``tests/bench/bigfleet.py``),
and, when ``SENSORLEDGER_BENCH_PG_URL`` (else ``SENSORLEDGER_TEST_PG_URL``) names a PostgreSQL
server, a database of its own there too (created and dropped here). On each it serves

- the app: ``uvicorn --factory server.app:create_app`` in a subprocess on a free port;
- the baseline: ``uvicorn --factory tests.bench.bare_app:create_bare_app``, a bare FastAPI +
  SQLAlchemy app reading one unit row, served the same way (same engine settings, one process,
  no access log),

and measures from this process over keep-alive HTTP connections (``http.client``), one request at
a time:

- the unit JSON lookup ``GET /api/v1/units/{serial}`` (Bearer token) against the bare endpoint,
  alternating in rounds of ``ROUND_S`` so that both sample the same spells of machine load:
  requests per second and median latency; goal: at least ``LOOKUP_GOAL`` x the bare throughput;
- the fleet page ``/`` (first page, pages 100 to 149, and filtered by the type), the unit page,
  "Needs attention" and one lazily loaded flag chart (signed in with a browser cookie): median
  latency; goals: fleet page at most ``FLEET_GOAL`` x the lookup's median, needs attention at
  most ``ATTENTION_GOAL_MS``;
- the peak resident memory of the server process during each case (``VmHWM`` of
  ``/proc/PID/status``, reset before each case through ``/proc/PID/clear_refs``).

Serials, flag ids and pages are cycled over many units so that no single row stays hot. Goals are
reported, not enforced: timings depend on the machine. A response other than 200 is an error.
"""

from __future__ import annotations

import contextlib
import http.client
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.parse
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
N_UNITS = 10_000
N_FLAGS = 500
ROUNDS = 5  # alternating rounds of the lookup and the bare endpoint
ROUND_S = 1.0  # seconds of each side per round
PAGE_S = 3.0  # seconds spent on each page case (at least PAGE_MIN requests)
PAGE_MIN = 5
WARM_UP = 3  # requests not counted before each case
LOOKUP_GOAL = 0.5  # throughput of the lookup / that of the bare endpoint, at least
FLEET_GOAL = 2.0  # fleet page median / lookup median, at most
ATTENTION_GOAL_MS = 300.0
STARTUP_S = 120.0  # the app migrates and checks due dates on start


@dataclass(frozen=True, slots=True)
class Measured:
    """One case: latencies (ms), requests per second over the time spent, peak RSS (MiB)."""

    name: str
    times_ms: list[float]
    per_s: float
    peak_mib: float | None

    @property
    def median_ms(self) -> float:
        return statistics.median(self.times_ms)


class Served:
    """A uvicorn subprocess serving ``factory`` on a free port of 127.0.0.1."""

    def __init__(self, factory: str, env: dict[str, str], log: Path) -> None:
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            self.port = int(s.getsockname()[1])
        self.log = log
        with open(log, "w") as out:
            self.proc = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "uvicorn",
                    "--factory",
                    factory,
                    "--host",
                    "127.0.0.1",
                    "--port",
                    str(self.port),
                    "--log-level",
                    "warning",
                    "--no-access-log",
                ],
                cwd=ROOT,
                env={**os.environ, **env, "PYTHONPATH": str(ROOT)},
                stdout=out,
                stderr=subprocess.STDOUT,
            )
        deadline = time.monotonic() + STARTUP_S
        while True:
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.5):
                    break
            except OSError:
                if self.proc.poll() is not None or time.monotonic() > deadline:
                    self.stop()
                    raise RuntimeError(f"{factory} did not start:\n{log.read_text()}") from None
                time.sleep(0.1)

    def connection(self) -> http.client.HTTPConnection:
        return http.client.HTTPConnection("127.0.0.1", self.port, timeout=300)

    def reset_peak(self) -> None:
        # not Linux, or not allowed: the peak since start is reported
        with contextlib.suppress(OSError):
            Path(f"/proc/{self.proc.pid}/clear_refs").write_text("5")

    def peak_mib(self) -> float | None:
        try:
            for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
        except OSError:
            return None
        return None

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


def _get(conn: http.client.HTTPConnection, path: str, headers: dict[str, str]) -> float:
    """GET ``path``; the time to the last byte (ms). Anything but 200 raises."""
    start = time.perf_counter()
    conn.request("GET", path, headers=headers)
    response = conn.getresponse()
    body = response.read()
    elapsed = (time.perf_counter() - start) * 1e3
    if response.status != 200:
        raise RuntimeError(f"GET {path}: {response.status} {body[:300]!r}")
    return elapsed


def _run(
    served: Served,
    paths: Callable[[int], str],
    headers: dict[str, str],
    seconds: float,
    minimum: int,
) -> tuple[list[float], float]:
    """Requests one after another for ``seconds`` (at least ``minimum``): times and wall time."""
    conn = served.connection()
    try:
        for i in range(WARM_UP):
            _get(conn, paths(i), headers)
        times: list[float] = []
        start = time.perf_counter()
        i = 0
        while len(times) < minimum or time.perf_counter() - start < seconds:
            times.append(_get(conn, paths(WARM_UP + i), headers))
            i += 1
        return times, time.perf_counter() - start
    finally:
        conn.close()


def _case(
    name: str,
    served: Served,
    paths: Callable[[int], str],
    headers: dict[str, str],
    *,
    seconds: float = PAGE_S,
    minimum: int = PAGE_MIN,
) -> Measured:
    served.reset_peak()
    times, wall = _run(served, paths, headers, seconds, minimum)
    return Measured(name, times, len(times) / wall, served.peak_mib())


def _lookup_pair(
    app: Served, bare: Served, serials: list[str], token: str
) -> tuple[Measured, Measured]:
    """The lookup and the bare endpoint, alternating rounds; each over the same serials."""
    ours: list[float] = []
    base: list[float] = []
    ours_wall = base_wall = 0.0
    app.reset_peak()
    bare.reset_peak()
    auth = {"Authorization": f"Bearer {token}"}
    for r in range(ROUNDS):
        offset = r * 1000

        def api(i: int, offset: int = offset) -> str:
            return f"/api/v1/units/{urllib.parse.quote(serials[(offset + i) % len(serials)])}"

        def plain(i: int, offset: int = offset) -> str:
            return f"/units/{urllib.parse.quote(serials[(offset + i) % len(serials)])}"

        times, wall = _run(app, api, auth, ROUND_S, PAGE_MIN)
        ours += times
        ours_wall += wall
        times, wall = _run(bare, plain, {}, ROUND_S, PAGE_MIN)
        base += times
        base_wall += wall
    return (
        Measured("unit JSON lookup", ours, len(ours) / ours_wall, app.peak_mib()),
        Measured("bare endpoint, one row", base, len(base) / base_wall, bare.peak_mib()),
    )


@contextmanager
def _databases(folder: Path) -> Iterator[Iterator[tuple[str, str]]]:
    """(label, url): a SQLite file, and a fresh PostgreSQL database when one is configured."""
    pg = os.environ.get("SENSORLEDGER_BENCH_PG_URL") or os.environ.get(
        "SENSORLEDGER_TEST_PG_URL", ""
    )
    created: list[str] = []

    def each() -> Iterator[tuple[str, str]]:
        yield "SQLite file", f"sqlite:///{folder / 'bigfleet.db'}"
        if not pg:
            return
        import sqlalchemy as sa
        from sqlalchemy.engine import make_url

        admin = sa.create_engine(pg, isolation_level="AUTOCOMMIT")
        name = f"sl_bench_{uuid.uuid4().hex[:10]}"
        try:
            with admin.connect() as conn:
                conn.execute(sa.text(f'CREATE DATABASE "{name}"'))
        except sa.exc.OperationalError as exc:
            print(f"(PostgreSQL at {pg} not reachable, skipped: {exc.orig})")
            return
        finally:
            admin.dispose()
        created.append(name)
        yield "PostgreSQL", make_url(pg).set(database=name).render_as_string(hide_password=False)

    try:
        yield each()
    finally:
        if created:
            import sqlalchemy as sa

            admin = sa.create_engine(pg, isolation_level="AUTOCOMMIT")
            with admin.connect() as conn:
                for name in created:
                    conn.execute(sa.text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
            admin.dispose()


def _mib(x: float | None) -> str:
    return f"{x:.0f}" if x is not None else "?"


def _bench_one(label: str, url: str, folder: Path) -> bool:
    from tests.bench.bigfleet import seed

    start = time.perf_counter()
    fleet = seed(url, n_units=N_UNITS, n_flags=N_FLAGS)
    seeded_s = time.perf_counter() - start
    counts = fleet.counts
    print(
        f"\n{label}: {counts['unit']:,} units of one type, {counts['calibration_session']:,} "
        f"sessions, {counts['point']:,} points, {counts['fit']:,} fits, {counts['flag']:,} open "
        f"flags (seeded in {seeded_s:.1f} s)"
    )
    app = Served(
        "server.app:create_app", {"SENSORLEDGER_DATABASE_URL": url}, folder / f"app-{label}.log"
    )
    try:
        bare = Served(
            "tests.bench.bare_app:create_bare_app",
            {"SENSORLEDGER_BENCH_BARE_URL": url},
            folder / f"bare-{label}.log",
        )
        try:
            lookup, baseline = _lookup_pair(app, bare, fleet.serials, fleet.api_token)
        finally:
            bare.stop()
        cookie = {"Cookie": f"sensorledger_signin={fleet.browser_token}"}
        partial = {**cookie, "HX-Request": "true"}
        kind = urllib.parse.quote(fleet.sensor_type)
        serials, flags = fleet.serials, fleet.flag_ids
        pages: list[tuple[str, Callable[[int], str], dict[str, str]]] = [
            ("fleet page /, first page", lambda i: "/", cookie),
            ("fleet page, pages 100-149", lambda i: f"/?page={100 + i % 50}", cookie),
            ("  filtered by its type", lambda i: f"/?type={kind}", cookie),
            (
                "unit page /units/{serial}",
                lambda i: f"/units/{urllib.parse.quote(serials[(i * 37) % len(serials)])}",
                cookie,
            ),
            ("needs attention /attention", lambda i: "/attention", cookie),
            (
                "  one flag's chart (htmx)",
                lambda i: f"/attention/flags/{flags[(i * 7) % len(flags)]}/chart",
                partial,
            ),
        ]
        measured: list[Measured | str] = []
        for name, paths, headers in pages:
            try:
                measured.append(_case(name, app, paths, headers))
            except RuntimeError as exc:
                measured.append(f"{name}: {exc}")
    finally:
        app.stop()

    ratio = lookup.per_s / baseline.per_s
    header = (
        f"{'case':<32} | {'median ms':>9} | {'req/s':>7} | {'n':>5} | {'peak MiB':>8} | "
        f"{'ratio':<18} | goal"
    )
    print(header)
    print("-" * (len(header) + 12))

    def line(m: Measured, ratio_text: str, goal: str = "") -> None:
        print(
            f"{m.name:<32} | {m.median_ms:>9.2f} | {m.per_s:>7.1f} | {len(m.times_ms):>5} | "
            f"{_mib(m.peak_mib):>8} | {ratio_text:<18} | {goal}"
        )

    line(
        lookup,
        f"{ratio:.2f}x bare req/s",
        f">= {LOOKUP_GOAL:g}x: {'met' if ratio >= LOOKUP_GOAL else 'NOT met'}",
    )
    line(baseline, "(baseline)")
    ok = True
    for m in measured:
        if isinstance(m, str):
            print(f"ERROR {m}")
            ok = False
            continue
        times_lookup = m.median_ms / lookup.median_ms
        goal = ""
        if m is measured[0]:
            goal = f"<= {FLEET_GOAL:g}x: {'met' if times_lookup <= FLEET_GOAL else 'NOT met'}"
        elif m.name.startswith("needs attention"):
            met = m.median_ms <= ATTENTION_GOAL_MS
            goal = f"<= {ATTENTION_GOAL_MS:g} ms: {'met' if met else 'NOT met'}"
        line(m, f"{times_lookup:.2f}x lookup", goal)
    return ok


def run_pages() -> bool:
    """Seed, serve, measure and print the table for each database; False on an error."""
    print(
        "\npages bench: the app and a bare FastAPI + SQLAlchemy endpoint, each served by uvicorn\n"
        "  (one process, subprocess) on the same database, measured one request at a time over\n"
        "  keep-alive HTTP from this process; lookup and bare alternate in "
        f"{ROUNDS} rounds of {ROUND_S:g} s;\n"
        f"  pages {PAGE_S:g} s each (at least {PAGE_MIN}); peak MiB = the server's peak RSS "
        "during the case"
    )
    ok = True
    folder = Path(tempfile.mkdtemp(prefix="sensorledger-pages-bench-"))
    with _databases(folder) as databases:
        for label, url in databases:
            ok &= _bench_one(label, url, folder)
    return ok


if __name__ == "__main__":
    sys.exit(0 if run_pages() else 1)
