"""History import: sessions/s and points/s against the floor of plain SQL inserts, in one run.

An invented sensor type ("Bench pot": line and quadratic families, tolerance 0.5 deg) and
invented units BH-00001...: each session's points follow value = g (0.1 r) + o + 1e-7 r^2 with
the unit's own gain g and offset o, drifting a little from session to session, and N(0, 0.02)
noise (fixed seed). The CSV is written to a temporary folder, then:

* ours: ``sensorledger import-history`` into a new SQLite file (migrated, with the type), in a
  child process: the file read and grouped, units created, sessions fitted in batches, the rows
  bulk-inserted a batch per commit, audit entries, the type's flags recomputed at the end;
* floor: the same rows (units, sessions, points, and fit rows carrying the very JSON the import
  stored) inserted with plain ``sqlite3`` executemany in one transaction into another new file
  of the same schema, in a child process, nothing computed.

Each child reports its wall time and its peak resident memory (``resource.getrusage``
ru_maxrss). Scale: ``--units`` (default 10,000) x 3 sessions x 15 points;
``python -m tests.bench.history_bench --units 1000`` runs it alone.
"""

from __future__ import annotations

import argparse
import csv
import json
import os
import resource
import sqlite3
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np

UNITS = 10_000
SESSIONS = 3
POINTS = 15
TYPE = "Bench pot"
SEED = 20240610
READINGS = np.linspace(0.0, 1000.0, POINTS)
FIRST = datetime(2019, 3, 4, 9, 0, tzinfo=UTC)


def write_history(path: Path, units: int) -> int:
    """The history CSV of ``units`` invented units; the number of rows written."""
    rng = np.random.default_rng(SEED)
    rows = 0
    with open(path, "w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        out.writerow(["serial", "sensor_type", "performed_at", "operator", "reference",
                      "reference_value", "reading"])  # fmt: skip
        for u in range(units):
            gain = 1.0 + 0.002 * rng.standard_normal()
            offset = 0.2 * rng.standard_normal()
            for s in range(SESSIONS):
                when = (FIRST + timedelta(days=365 * s + u % 97)).isoformat()
                drift = 0.05 * s * rng.standard_normal()
                values = gain * 0.1 * READINGS + offset + drift + 1e-7 * READINGS**2
                values = values + rng.normal(0.0, 0.02, POINTS)
                for r, v in zip(READINGS, values, strict=True):
                    out.writerow([f"BH-{u:05d}", TYPE, when, "bench", "angle jig AJ-1",
                                  f"{v:.4f}", f"{r:g}"])  # fmt: skip
                    rows += 1
    return rows


def new_database(path: Path) -> str:
    """A migrated SQLite file holding the bench's sensor type; its URL."""
    from server.db import make_engine, make_sessionmaker
    from server.fleet.schemas import SensorTypeCreate
    from server.fleet.service import create_sensor_type
    from server.migrate import upgrade

    url = f"sqlite:///{path}"
    engine = make_engine(url)
    upgrade(engine)
    with make_sessionmaker(engine)() as session:
        create_sensor_type(
            session,
            SensorTypeCreate(
                name=TYPE,
                quantity="angle",
                value_unit="deg",
                reading_unit="counts",
                reading_min=0,
                reading_max=1023,
                families=["line", "polynomial"],
                tolerance_abs=0.5,
                drift_limit_abs=0.3,
            ),
        )
        session.commit()
    engine.dispose()
    return url


def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB on Linux


def child_import(csv_path: str, url: str) -> dict[str, float]:
    """In the child: the import as the command runs it; times of its stages."""
    from server.calibrations.history import import_history
    from server.calibrations.history_csv import read_history
    from server.db import make_engine, make_sessionmaker

    start = time.perf_counter()
    with open(csv_path, encoding="utf-8-sig", newline="") as handle:
        parsed = read_history(handle)
    read = time.perf_counter()
    marks: dict[str, float] = {}

    def stage(text: str) -> None:
        if text.startswith("recomputing the flags"):
            marks["flags"] = time.perf_counter()
            marks["peak_before_flags"] = peak_mb()

    engine = make_engine(url)
    with make_sessionmaker(engine)() as session:
        result = import_history(session, parsed, actor="bench", source="bench", on_stage=stage)
    done = time.perf_counter()
    engine.dispose()
    assert result.rejected == 0 and result.stored == len(parsed.sessions), result.summary()
    return {
        "seconds": done - start,
        "read": read - start,
        "store": marks.get("flags", done) - read,
        "flags": done - marks.get("flags", done),
        "sessions": result.stored,
        "points": result.points,
        "peak_mb": peak_mb(),
        "peak_before_flags_mb": marks.get("peak_before_flags", peak_mb()),
    }


def child_floor(source: str, target: str) -> dict[str, float]:
    """In the child: the same rows with plain SQL executemany, one transaction."""
    src = sqlite3.connect(source)
    units = src.execute("SELECT id, serial, sensor_type_id, status FROM unit").fetchall()
    sessions = src.execute(
        "SELECT id, unit_id, performed_at, operator, reference, reference_k, kind, recorded_by,"
        " created_at FROM calibration_session"
    ).fetchall()
    points = src.execute(
        "SELECT session_id, seq, reference_value, reading, repeat_index, excluded FROM point"
    ).fetchall()
    fits = src.execute(
        "SELECT session_id, family, options, result, decision, ranking, diagnostics, passed,"
        " is_current, engine_version, created_at FROM fit"
    ).fetchall()
    src.close()
    dst = sqlite3.connect(target, isolation_level=None)
    dst.execute("PRAGMA journal_mode=WAL")
    dst.execute("PRAGMA foreign_keys=ON")
    dst.execute("DELETE FROM unit WHERE serial LIKE 'BH-%'")
    start = time.perf_counter()
    dst.execute("BEGIN")
    dst.executemany(
        "INSERT INTO unit (id, serial, sensor_type_id, status, created_at) VALUES (?, ?, ?, ?, ?)",
        [(*u, FIRST.isoformat()) for u in units],
    )
    dst.executemany(
        "INSERT INTO calibration_session (id, unit_id, performed_at, operator, reference,"
        " reference_k, kind, recorded_by, created_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
        sessions,
    )
    dst.executemany(
        "INSERT INTO point (session_id, seq, reference_value, reading, repeat_index, excluded)"
        " VALUES (?, ?, ?, ?, ?, ?)",
        points,
    )
    dst.executemany(
        "INSERT INTO fit (session_id, family, options, result, decision, ranking, diagnostics,"
        " passed, is_current, engine_version, created_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        fits,
    )
    dst.execute("COMMIT")
    seconds = time.perf_counter() - start
    dst.close()
    return {"seconds": seconds, "peak_mb": peak_mb(), "sessions": len(sessions),
            "points": len(points)}  # fmt: skip


def run_child(*argv: str) -> dict[str, float]:
    root = Path(__file__).resolve().parents[2]
    env = {**os.environ, "PYTHONPATH": str(root)}
    done = subprocess.run(
        [sys.executable, "-m", "tests.bench.history_bench", *argv],
        capture_output=True, text=True, cwd=root, env=env, check=False,
    )  # fmt: skip
    if done.returncode != 0:
        raise RuntimeError(f"history bench child {argv[0]} failed:\n{done.stderr}")
    found: dict[str, float] = json.loads(done.stdout.strip().splitlines()[-1])
    return found


def report(units: int = UNITS) -> list[str]:
    """Run the case; the lines to print."""
    with tempfile.TemporaryDirectory(prefix="history-bench-") as folder:
        tmp = Path(folder)
        history = tmp / "history.csv"
        rows = write_history(history, units)
        url = new_database(tmp / "ours.db")
        new_database(tmp / "floor.db")
        size = history.stat().st_size
        ours = run_child("import", str(history), url)
        floor = run_child("floor", str(tmp / "ours.db"), str(tmp / "floor.db"))
    store = ours["read"] + ours["store"]
    return [
        f"history import: {units:,} units x {SESSIONS} sessions x {POINTS} points = "
        f"{rows:,} rows ({size / 1e6:.1f} MB CSV), invented type '{TYPE}' (line, polynomial), "
        "SQLite file",
        f"  ours  {ours['seconds']:8.1f} s  = read {ours['read']:.1f} s + fit and store "
        f"{ours['store']:.1f} s + flags of the type {ours['flags']:.1f} s; peak memory "
        f"{ours['peak_mb']:.0f} MB ({ours['peak_before_flags_mb']:.0f} MB before the flags)",
        f"        {ours['sessions'] / ours['seconds']:8.0f} sessions/s, "
        f"{ours['points'] / ours['seconds']:,.0f} points/s overall; without the flags "
        f"{ours['sessions'] / store:,.0f} sessions/s, {ours['points'] / store:,.0f} points/s",
        f"  floor {floor['seconds']:8.1f} s  plain sqlite3 executemany of the same units, "
        f"sessions, points and fit rows (same JSON), one transaction; peak memory "
        f"{floor['peak_mb']:.0f} MB",
        f"  ratio ours / floor: {ours['seconds'] / floor['seconds']:.1f} overall, "
        f"{store / floor['seconds']:.1f} without the flags",
    ]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("step", nargs="?", choices=["import", "floor"], help=argparse.SUPPRESS)
    parser.add_argument("paths", nargs="*", help=argparse.SUPPRESS)
    parser.add_argument("--units", type=int, default=UNITS)
    args = parser.parse_args()
    if args.step == "import":
        print(json.dumps(child_import(*args.paths)))
    elif args.step == "floor":
        print(json.dumps(child_floor(*args.paths)))
    else:
        print("\n".join(report(args.units)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
