"""Real server processes on 127.0.0.1 (killed in a ``finally``) and HTTP clients from the
standard library (see harness.py)."""

from __future__ import annotations

import http.client
import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlencode

from tests.liveserver import free_port
from tests.reliability.harness import HTTP_TIMEOUT_S, IDLE_S, ROOT, STARTUP_S

# -- servers -----------------------------------------------------------------------------------


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
