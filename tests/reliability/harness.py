"""The reliability suite's tools: real server processes, a fleet seeded before they start, HTTP
clients from the standard library, a load of writers and readers, and the checks made on the
database afterwards.

Everything here talks to 127.0.0.1 only, and every server process is killed in a ``finally``
(``servers``). The data are invented (common practice, no source): potentiometer-like units read
in counts, value = slope r + offset with a little noise, each unit with its own slope and offset
and a few units set well apart from the others so the fleet comparison has something to find.
"""

from __future__ import annotations

import http.client
import json
import os
import random
import signal
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections import Counter
from collections.abc import Iterator, Sequence
from contextlib import contextmanager, suppress
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from urllib.parse import urlencode

import numpy as np
import sqlalchemy as sa
from sqlalchemy.orm import Session, selectinload

from tests.server import lines

ROOT = Path(__file__).resolve().parents[2]
# seconds of load per load test; a longer run: SENSORLEDGER_LOAD_SECONDS=60
LOAD_SECONDS = float(os.environ.get("SENSORLEDGER_LOAD_SECONDS", "12"))
STARTUP_S = 60.0  # a server must answer within this (it migrates the database first)
CATCH_UP_S = 30.0  # after the load, the fleet comparison must be done within this
HTTP_TIMEOUT_S = 120.0  # one request; a SQLite writer may wait 30 s for the write lock
IDLE_S = 2.0  # a connection idle longer is opened afresh (uvicorn closes idle ones after 5 s)
READINGS = np.arange(0.0, 1001.0, 100.0)  # counts, 11 points per session
T0 = datetime(2021, 1, 4, 8, 0, tzinfo=UTC)  # first performed_at of the load's sessions
TECH = ("rel-tech", "rel-tech-pw")
ADMIN = ("rel-admin", "rel-admin-pw")
PG_MARK = "postgresql"

# -- servers -----------------------------------------------------------------------------------


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Server:
    """``sensorledger serve --db URL --port P`` in a subprocess (this worktree's code)."""

    def __init__(self, url: str, log_dir: Path, name: str, **env: str) -> None:
        self.url = url
        self.name = name
        self.log_path = log_dir / f"{name}.log"
        self.env = env
        self.port = 0
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def base(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self) -> Server:
        self.port = free_port()
        env = {
            **os.environ,
            "PYTHONPATH": str(ROOT),
            "SENSORLEDGER_JOB_POLL_S": "0.5",
            **self.env,
        }
        env.pop("SENSORLEDGER_DATABASE_URL", None)
        command = [sys.executable, "-m", "server.cli", "serve", "--db", self.url]
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(
                [*command, "--port", str(self.port)],
                cwd=ROOT,
                env=env,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        deadline = time.monotonic() + STARTUP_S
        while True:
            if self.proc.poll() is not None or time.monotonic() > deadline:
                raise AssertionError(
                    f"server {self.name} did not start (exit {self.proc.poll()}):\n{self.log()}"
                )
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=1):
                    pass
                if Client(self.base).request("GET", "/signin").status == 200:
                    return self
            except OSError:
                pass
            time.sleep(0.1)

    def kill(self) -> None:
        """SIGKILL: no lifespan, no rollback, no goodbye."""
        if self.proc is not None and self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait()

    def stop(self) -> None:
        """SIGTERM (uvicorn's graceful shutdown), SIGKILL after 20 s."""
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.terminate()
        try:
            self.proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            self.kill()

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")[-6000:]


@contextmanager
def servers(*started: Server) -> Iterator[list[Server]]:
    """Start each server; every one is stopped (or killed) however the block ends."""
    running: list[Server] = []
    try:
        for s in started:
            running.append(s.start())
        yield running
    finally:
        for s in started:
            with suppress(Exception):
                s.stop()
            s.kill()


# -- HTTP ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Reply:
    status: int
    headers: dict[str, str]
    body: bytes
    seconds: float

    def json(self) -> Any:
        return json.loads(self.body)


class Client:
    """One keep-alive connection (http.client); not shared between threads."""

    def __init__(self, base: str, headers: dict[str, str] | None = None) -> None:
        host, port = base.removeprefix("http://").split(":")
        self.host, self.port = host, int(port)
        self.headers = dict(headers or {})
        self.conn: http.client.HTTPConnection | None = None
        self.used = 0.0

    def _connection(self) -> http.client.HTTPConnection:
        if self.conn is not None and time.monotonic() - self.used > IDLE_S:
            self.close()  # the server may be closing it right now: never race it
        if self.conn is None:
            self.conn = http.client.HTTPConnection(self.host, self.port, timeout=HTTP_TIMEOUT_S)
        return self.conn

    def close(self) -> None:
        if self.conn is not None:
            self.conn.close()
            self.conn = None

    def request(
        self,
        method: str,
        path: str,
        body: bytes | None = None,
        headers: dict[str, str] | None = None,
    ) -> Reply:
        """Send once; on a connection error the connection is dropped and the error raised."""
        all_headers = {**self.headers, **(headers or {})}
        start = time.perf_counter()
        try:
            conn = self._connection()
            conn.request(method, path, body=body, headers=all_headers)
            response = conn.getresponse()
            data = response.read()
        except (OSError, http.client.HTTPException):
            self.close()
            raise
        seconds = time.perf_counter() - start
        self.used = time.monotonic()
        if response.getheader("connection", "").lower() == "close":
            self.close()
        return Reply(
            response.status, {k.lower(): v for k, v in response.getheaders()}, data, seconds
        )

    def post_json(self, path: str, payload: Any, headers: dict[str, str] | None = None) -> Reply:
        return self.request(
            "POST",
            path,
            json.dumps(payload).encode(),
            {"Content-Type": "application/json", **(headers or {})},
        )


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def browser_client(base: str, name: str, password: str) -> Client:
    """A client signed in through the sign-in form, as a browser is (the session cookie)."""
    client = Client(base)
    reply = client.request(
        "POST",
        "/signin",
        urlencode({"name": name, "password": password, "next": "/"}).encode(),
        {"Content-Type": "application/x-www-form-urlencoded"},
    )
    assert reply.status == 303, reply.body[:500]
    cookie = reply.headers["set-cookie"].split(";", 1)[0]
    client.headers["Cookie"] = cookie
    return client


# -- the fleet -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Fleet:
    type_name: str
    serials: tuple[str, ...]
    tech_token: str
    admin_token: str


def unit_shape(index: int) -> tuple[float, float]:
    """(slope, offset) of unit ``index``: 1 % and 0.1 deg apart; every 10th unit 1.5 deg off."""
    rng = np.random.default_rng(1000 + index)
    slope = 0.1 * (1.0 + 0.01 * rng.standard_normal())
    offset = 0.1 * rng.standard_normal() + (1.5 if index % 10 == 7 else 0.0)
    return float(slope), float(offset)


def points_of(index: int, seed: int) -> list[dict[str, float]]:
    """A session's points for unit ``index``: its line plus N(0, 0.02) deg (fixed seed)."""
    slope, offset = unit_shape(index)
    rng = np.random.default_rng(seed)
    values = slope * READINGS + offset + rng.normal(0.0, 0.02, READINGS.size)
    return [
        {"reference_value": round(float(v), 4), "reading": float(r)}
        for v, r in zip(values, READINGS, strict=True)
    ]


def pot_type(name: str, **changes: Any) -> dict[str, Any]:
    """The API tests' pot type (tests/server/lines.py) with a yearly interval."""
    return lines.pot_type(name, **{"interval_days": 365, **changes})


def seed_fleet(
    url: str,
    *,
    n_units: int,
    sessions_per_unit: int = 0,
    type_body: dict[str, Any] | None = None,
    serial_prefix: str = "REL",
) -> Fleet:
    """Migrate the database and add users with API tokens, a sensor type, its units and (with
    ``sessions_per_unit``) calibrations stored through the services, flags recomputed once."""
    from server.accounts import service as accounts
    from server.accounts.models import Role
    from server.calibrations import service as calibrations
    from server.calibrations.schemas import CalibrationCreate, PointIn
    from server.db import make_engine, make_sessionmaker
    from server.flags.service import recompute_flags
    from server.fleet import service as fleet
    from server.fleet.schemas import SensorTypeCreate, UnitCreate
    from server.migrate import upgrade

    body = type_body or pot_type("Reliability pot")
    engine = make_engine(url)
    try:
        upgrade(engine)
        with make_sessionmaker(engine)() as session:
            tech = accounts.create_user(session, TECH[0], Role.technician, password=TECH[1])
            admin = accounts.create_user(session, ADMIN[0], Role.admin, password=ADMIN[1])
            tech_token = accounts.create_token(session, tech, "reliability")
            admin_token = accounts.create_token(session, admin, "reliability")
            st = fleet.create_sensor_type(session, SensorTypeCreate(**body))
            serials = tuple(f"{serial_prefix}-{i:04d}" for i in range(n_units))
            for i, serial in enumerate(serials):
                unit = fleet.create_unit(session, UnitCreate(serial=serial, sensor_type=st.name))
                for k in range(sessions_per_unit):
                    calibrations.run_calibration(
                        session,
                        unit,
                        CalibrationCreate(
                            performed_at=T0 - timedelta(days=400 * (sessions_per_unit - k)),
                            operator="seed",
                            reference="angle jig",
                            points=[PointIn(**p) for p in points_of(i, 10_000 * i + k)],
                        ),
                        recorded_by="seed",
                    )
            if sessions_per_unit:
                session.flush()
                recompute_flags(session, st)
            session.commit()
    finally:
        engine.dispose()
    return Fleet(body["name"], serials, tech_token, admin_token)


def session_body(index: int, when: datetime, seed: int) -> dict[str, Any]:
    return {
        "performed_at": when.isoformat(),
        "operator": "load",
        "reference": "angle jig",
        "kind": "periodic",
        "points": points_of(index, seed),
    }


# -- the load ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Ack:
    """A session the server acknowledged (201)."""

    serial: str
    performed_at: datetime
    session_id: int


@dataclass
class Load:
    """What the writers and readers saw."""

    seconds: float = 0.0
    acked: list[Ack] = field(default_factory=list)
    save_latency: list[float] = field(default_factory=list)  # first POSTs answered 201
    statuses: Counter[int] = field(default_factory=Counter)  # every answer, writers and readers
    reads: int = 0
    read_latency: list[float] = field(default_factory=list)
    replays: int = 0  # retries with a key already answered, replayed as such
    twins: int = 0  # the same POST sent twice at once
    problems: list[str] = field(default_factory=list)  # wrong answers, connection errors
    lock: threading.Lock = field(default_factory=threading.Lock)

    def problem(self, text: str) -> None:
        with self.lock:
            if len(self.problems) < 50:
                self.problems.append(text)

    @property
    def server_errors(self) -> int:
        return sum(n for status, n in self.statuses.items() if status >= 500)

    def summary(self, label: str) -> str:
        lat = np.array(self.save_latency) * 1e3
        reads = np.array(self.read_latency) * 1e3
        p50, p95 = np.percentile(lat, [50, 95]) if lat.size else (np.nan, np.nan)
        r50 = np.percentile(reads, 50) if reads.size else np.nan
        return (
            f"{label}: {len(self.acked)} sessions saved in {self.seconds:.1f} s = "
            f"{len(self.acked) / self.seconds:.1f} saves/s (p50 {p50:.0f} ms, p95 {p95:.0f} ms); "
            f"{self.reads} page reads = {self.reads / self.seconds:.1f} reads/s "
            f"(p50 {r50:.0f} ms); "
            f"5xx {self.server_errors}; retries replayed {self.replays}, "
            f"simultaneous twins {self.twins}"
        )


def _writer(
    load: Load,
    base: str,
    fleet: Fleet,
    number: int,
    deadline: float,
    *,
    retry_share: float,
    twin_share: float,
    stop: threading.Event,
) -> None:
    rng = random.Random(7919 * number + 1)
    client = Client(base, bearer(fleet.tech_token))
    twin_client = Client(base, bearer(fleet.tech_token))
    seq = 0
    try:
        while time.monotonic() < deadline and not stop.is_set():
            index = rng.randrange(len(fleet.serials))
            serial = fleet.serials[index]
            when = T0 + timedelta(minutes=100_000 * number + seq)
            body = session_body(index, when, 1_000_000 * number + seq)
            seq += 1
            path = f"/api/v1/units/{serial}/calibrations"
            key = {"Idempotency-Key": uuid.UUID(int=rng.getrandbits(128)).hex}
            draw = rng.random()
            try:
                if draw < twin_share:
                    replies = _twins(client, twin_client, path, body, key)
                    with load.lock:
                        load.twins += 1
                else:
                    replies = [client.post_json(path, body, key)]
            except (OSError, http.client.HTTPException) as exc:
                load.problem(f"writer {number}: {type(exc).__name__}: {exc}")
                if stop.is_set():
                    return
                continue
            first = replies[0]
            with load.lock:
                for r in replies:
                    load.statuses[r.status] += 1
            if any(r.status != 201 for r in replies):
                load.problem(
                    f"writer {number}: {[r.status for r in replies]} "
                    + b" | ".join(r.body[:300] for r in replies).decode(errors="replace")
                )
                continue
            ids = {r.json()["id"] for r in replies}
            fresh = [r for r in replies if r.headers.get("idempotency-replayed") != "true"]
            if len(ids) != 1 or len(fresh) != 1:
                load.problem(
                    f"writer {number}: one key gave sessions {sorted(ids)}, "
                    f"{len(fresh)} answered as new"
                )
                continue
            session_id = ids.pop()
            with load.lock:
                load.acked.append(Ack(serial, when, session_id))
                load.save_latency.append(first.seconds)
            if draw > 1.0 - retry_share:  # the script lost the answer and sends it again
                try:
                    again = client.post_json(path, body, key)
                except (OSError, http.client.HTTPException) as exc:
                    load.problem(f"writer {number}: retry: {type(exc).__name__}: {exc}")
                    continue
                with load.lock:
                    load.statuses[again.status] += 1
                if (
                    again.status != 201
                    or again.headers.get("idempotency-replayed") != "true"
                    or again.json()["id"] != session_id
                ):
                    load.problem(
                        f"writer {number}: retry answered {again.status} {again.body[:300]!r}"
                    )
                else:
                    with load.lock:
                        load.replays += 1
    finally:
        client.close()
        twin_client.close()


def _twins(
    client: Client, twin: Client, path: str, body: dict[str, Any], key: dict[str, str]
) -> list[Reply]:
    """The same POST (same key) sent on two connections at the same moment."""
    out: dict[int, Reply | BaseException] = {}
    barrier = threading.Barrier(2)

    def send(i: int, c: Client) -> None:
        barrier.wait()
        try:
            out[i] = c.post_json(path, body, key)
        except BaseException as exc:
            out[i] = exc

    other = threading.Thread(target=send, args=(1, twin))
    other.start()
    send(0, client)
    other.join()
    replies = []
    for i in (0, 1):
        r = out[i]
        if isinstance(r, BaseException):
            raise r
        replies.append(r)
    return replies


def _reader(load: Load, base: str, deadline: float, stop: threading.Event) -> None:
    client = browser_client(base, *TECH)
    pages = ("/", "/attention")
    i = 0
    try:
        while time.monotonic() < deadline and not stop.is_set():
            path = pages[i % 2]
            i += 1
            try:
                reply = client.request("GET", path)
            except (OSError, http.client.HTTPException) as exc:
                load.problem(f"reader: GET {path}: {type(exc).__name__}: {exc}")
                continue
            with load.lock:
                load.statuses[reply.status] += 1
                load.reads += 1
                load.read_latency.append(reply.seconds)
            if reply.status != 200:
                load.problem(f"reader: GET {path} answered {reply.status} {reply.body[:300]!r}")
    finally:
        client.close()


def run_load(
    bases: Sequence[str],
    fleet: Fleet,
    seconds: float,
    *,
    writers: int = 16,
    readers: int = 4,
    retry_share: float = 0.1,
    twin_share: float = 0.05,
    stop: threading.Event | None = None,
    load: Load | None = None,
) -> Load:
    """``writers`` threads posting sessions and ``readers`` threads loading the fleet and
    needs-attention pages, spread over ``bases``, for ``seconds``. ``stop`` ends it early;
    ``load`` is filled as it goes (another thread may watch it)."""
    load = load if load is not None else Load()
    stop = stop or threading.Event()
    deadline = time.monotonic() + seconds

    def guarded(target: Any) -> Any:
        def run(*args: Any, **kwargs: Any) -> None:
            try:
                target(*args, **kwargs)
            except Exception as exc:  # an unexpected answer: the test fails, naming it
                load.problem(f"{threading.current_thread().name}: {type(exc).__name__}: {exc}")

        return run

    threads = [
        threading.Thread(
            target=guarded(_writer),
            args=(load, bases[i % len(bases)], fleet, i, deadline),
            kwargs={"retry_share": retry_share, "twin_share": twin_share, "stop": stop},
            name=f"writer-{i}",
        )
        for i in range(writers)
    ] + [
        threading.Thread(
            target=guarded(_reader),
            args=(load, bases[i % len(bases)], deadline, stop),
            name=f"reader-{i}",
        )
        for i in range(readers)
    ]
    start = time.monotonic()
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=seconds + HTTP_TIMEOUT_S + 30)
    load.seconds = time.monotonic() - start
    stuck = [t.name for t in threads if t.is_alive()]
    assert not stuck, f"load threads did not end: {stuck}"
    return load


# -- checks on the database ----------------------------------------------------------------------


@contextmanager
def database(url: str) -> Iterator[Session]:
    """A session on the database (reads; the server may still be running)."""
    from server.db import make_engine

    engine = make_engine(url)
    try:
        with Session(engine) as s:
            yield s
    finally:
        engine.dispose()


def stored_sessions(s: Session) -> Counter[tuple[str, datetime]]:
    """How many sessions each (unit serial, performed_at) has."""
    from server.calibrations.models import CalibrationSession
    from server.fleet.models import Unit

    rows = s.execute(
        sa.select(Unit.serial, CalibrationSession.performed_at).join(CalibrationSession.unit)
    )
    return Counter((serial, when) for serial, when in rows)


def check_acknowledged(s: Session, acked: Sequence[Ack], *, exactly: bool) -> None:
    """Every acknowledged session stored once, under the id it was answered with; no session
    stored twice; with ``exactly``, nothing stored that was not acknowledged."""
    from server.calibrations.models import CalibrationSession

    counts = stored_sessions(s)
    twice = {k: n for k, n in counts.items() if n > 1}
    assert not twice, f"sessions stored more than once: {list(twice.items())[:10]}"
    ids = set(s.scalars(sa.select(CalibrationSession.id)))
    missing = [a for a in acked if (a.serial, a.performed_at) not in counts]
    assert not missing, f"{len(missing)} acknowledged sessions missing, e.g. {missing[:5]}"
    wrong = [a for a in acked if a.session_id not in ids]
    assert not wrong, f"acknowledged under ids not stored: {wrong[:5]}"
    assert len({a.session_id for a in acked}) == len(acked), "one id acknowledged twice"
    if exactly:
        assert sum(counts.values()) == len(acked) + seeded_sessions(s), (
            f"{sum(counts.values())} sessions stored, {len(acked)} acknowledged"
        )


def seeded_sessions(s: Session) -> int:
    from server.calibrations.models import CalibrationSession

    return (
        s.scalar(
            sa.select(sa.func.count())
            .select_from(CalibrationSession)
            .where(CalibrationSession.operator == "seed")
        )
        or 0
    )


def check_sessions_whole(s: Session, n_points: int = READINGS.size) -> int:
    """Every session has all its points and exactly one current fit, and that fit is the one
    its stored points give (refitted with shared.fit: parameters within 1e-9 relative;
    residuals = value - curve). How many sessions were checked."""
    import shared
    from server.calibrations.models import CalibrationSession

    records = s.scalars(
        sa.select(CalibrationSession).options(
            selectinload(CalibrationSession.points),
            selectinload(CalibrationSession.fits),
            selectinload(CalibrationSession.unit),
        )
    ).all()
    bad: list[str] = []
    for record in records:
        current = [f for f in record.fits if f.is_current]
        if len(record.points) != n_points or len(current) != 1:
            bad.append(
                f"session {record.id}: {len(record.points)} points, {len(current)} current fits"
            )
            continue
        stored = shared.Fit.from_dict(current[0].result)
        reading = np.array([p.reading for p in record.points])
        value = np.array([p.reference_value for p in record.points])
        if not (np.array_equal(stored.reading, reading) and np.array_equal(stored.value, value)):
            bad.append(f"session {record.id}: the fit was made from other points")
            continue
        refit = shared.fit(
            stored.family,
            reading,
            value,
            noise=stored.noise,
            exclude=dict(stored.excluded) or None,
            **dict(stored.options),
        )
        for name, p in stored.params.items():
            q = refit.params[name]
            if abs(p - q) > 1e-9 * max(abs(p), abs(q), 1e-300) and abs(p - q) > 1e-12:
                bad.append(f"session {record.id}: {name} stored {p!r}, refitted {q!r}")
        used = np.asarray(stored.used, dtype=bool)
        expected = value - stored.to_value(reading, extrapolate=True)
        if not np.allclose(np.asarray(stored.residuals)[used], expected[used], rtol=0, atol=1e-9):
            bad.append(f"session {record.id}: residuals are not value - curve")
    assert not bad, f"{len(bad)} sessions not whole or not consistent: {bad[:10]}"
    return len(records)


def unfinished_jobs(s: Session, kind: str | None = None) -> list[tuple[int, str, str]]:
    from server.jobs.models import Job, JobState

    query = sa.select(Job.id, Job.kind, Job.state).where(
        Job.state.in_([JobState.queued, JobState.running])
    )
    if kind is not None:
        query = query.where(Job.kind == kind)
    return [(i, str(k), str(st)) for i, k, st in s.execute(query)]


def wait_for_fleet(url: str, timeout: float = CATCH_UP_S) -> float:
    """Wait until no fleet comparison is queued or running; how long it took (s). Fails after
    ``timeout``."""
    start = time.monotonic()
    while True:
        with database(url) as s:
            left = unfinished_jobs(s, "fleet")
        if not left:
            return time.monotonic() - start
        if time.monotonic() - start > timeout:
            raise AssertionError(f"fleet comparison still catching up after {timeout:g} s: {left}")
        time.sleep(0.25)


def check_fleet_flags(s: Session, type_name: str) -> int:
    """The open fleet_outlier flags are what shared.fleet.fleet_outliers gives on the units'
    stored current fits (same units, same session, same level). How many units flagged."""
    import shared
    from server.calibrations.models import CalibrationSession, latest_session
    from server.flags.models import Flag, FlagKind, Severity
    from server.fleet.models import SensorType, Unit, UnitStatus
    from shared.fleet import fleet_outliers

    st = s.scalar(sa.select(SensorType).where(SensorType.name == type_name))
    assert st is not None
    units = s.scalars(
        sa.select(Unit)
        .where(Unit.sensor_type_id == st.id, Unit.status != UnitStatus.retired)
        .options(selectinload(Unit.sessions).selectinload(CalibrationSession.fits))
    ).all()
    current: dict[str, tuple[int, shared.Fit]] = {}
    for u in units:
        last = latest_session(u.sessions)
        if last is not None and last.current_fit is not None:
            current[u.serial] = (last.id, shared.Fit.from_dict(last.current_fit.result))
    expected: set[tuple[str, int, str]] = set()
    if len(current) >= 2:
        result = fleet_outliers({serial: fit for serial, (_, fit) in current.items()})
        for serials, severity in (
            (result.flagged, Severity.action),
            (result.warned, Severity.warning),
        ):
            expected |= {(s, current[s][0], severity.value) for s in serials}
    got = {
        (f.unit.serial, int(f.evidence["session_id"]), f.severity.value)
        for f in s.scalars(
            sa.select(Flag)
            .join(Flag.unit)
            .where(
                Unit.sensor_type_id == st.id,
                Flag.kind == FlagKind.fleet_outlier,
                Flag.open.is_(True),
            )
            .options(selectinload(Flag.unit))
        )
    }
    assert got == expected, (
        f"fleet flags differ from fleet_outliers on the stored fits: only stored "
        f"{sorted(got - expected)}, only expected {sorted(expected - got)}"
    )
    return len(expected)


def check_jobs_ran_once(s: Session) -> int:
    """Every fleet comparison and refit finished, each claimed once. How many jobs."""
    from server.jobs.models import Job, JobKind

    rows = s.execute(
        sa.select(Job.id, Job.kind, Job.state, Job.attempts, Job.claimed_by).where(
            Job.kind.in_([JobKind.fleet, JobKind.refit])
        )
    ).all()
    wrong = [r for r in rows if str(r.state) != "done" or r.attempts != 1]
    assert not wrong, f"jobs not done exactly once: {wrong[:10]}"
    return len(rows)


def integrity_ok(url: str) -> None:
    """SQLite's PRAGMA integrity_check says ok (nothing to check on PostgreSQL)."""
    if not url.startswith("sqlite"):
        return
    engine = sa.create_engine(url)
    try:
        with engine.connect() as conn:
            rows = [r[0] for r in conn.exec_driver_sql("PRAGMA integrity_check")]
    finally:
        engine.dispose()
    assert rows == ["ok"], rows


def current_fit_ids(s: Session) -> dict[int, int]:
    """session id -> id of its current fit (sessions with exactly one)."""
    from server.calibrations.models import FitRecord

    counts: Counter[int] = Counter()
    ids: dict[int, int] = {}
    for sid, fid in s.execute(
        sa.select(FitRecord.session_id, FitRecord.id).where(FitRecord.is_current.is_(True))
    ):
        counts[sid] += 1
        ids[sid] = fid
    twice = [sid for sid, n in counts.items() if n != 1]
    assert not twice, f"sessions with more than one current fit: {twice[:10]}"
    return ids
