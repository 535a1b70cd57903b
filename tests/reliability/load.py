"""The load: writers posting sessions and readers loading pages, counting every answer."""

from __future__ import annotations

import http.client
import random
import threading
import time
import uuid
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

import numpy as np

from tests.reliability.fleet import Fleet, session_body
from tests.reliability.harness import HTTP_TIMEOUT_S, T0, TECH
from tests.reliability.processes import Client, Reply, bearer, browser_client

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
