"""The reliability suite's settings. Its tools: ``processes`` (real server processes and HTTP
clients from the standard library), ``fleet`` (a fleet seeded before the servers start), ``load``
(writers and readers) and ``checks`` (what is checked on the database afterwards).

Everything here talks to 127.0.0.1 only, and every server process is killed in a ``finally``
(``servers``). The data are invented (common practice, no source): potentiometer-like units read
in counts, value = slope r + offset with a little noise, each unit with its own slope and offset
and a few units set well apart from the others so the fleet comparison has something to find.
"""

from __future__ import annotations

import os
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

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
