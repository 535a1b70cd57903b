"""Checks made on the database after the load or a kill."""

from __future__ import annotations

import time
from collections import Counter
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from datetime import datetime

import numpy as np
import sqlalchemy as sa
from sqlalchemy.orm import Session, selectinload

from tests.reliability.harness import CATCH_UP_S, READINGS
from tests.reliability.load import Ack

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
