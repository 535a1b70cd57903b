"""The app served for real in tests: ``uvicorn --factory server.app:create_app`` in a subprocess
on a free port of 127.0.0.1, on the database a test names (the browser suite, the capture tests)."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import urllib.error
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def answers(url: str) -> bool:
    """Does ``url`` answer 200 now?"""
    try:
        with urllib.request.urlopen(url, timeout=1) as response:
            return bool(response.status == 200)
    except (urllib.error.URLError, ConnectionError, TimeoutError):
        return False


def start_uvicorn(database_url: str, port: int, log_path: Path) -> subprocess.Popen[bytes]:
    """The app on ``database_url`` at 127.0.0.1:``port``, its output appended to ``log_path``."""
    with log_path.open("a") as log:
        return subprocess.Popen(
            [
                sys.executable,
                "-m",
                "uvicorn",
                "--factory",
                "server.app:create_app",
                "--host",
                "127.0.0.1",
                "--port",
                str(port),
                "--log-level",
                "warning",
            ],
            cwd=ROOT,
            env={**os.environ, "SENSORLEDGER_DATABASE_URL": database_url},
            stdout=log,
            stderr=subprocess.STDOUT,
        )
