"""The fleet comparison of a sensor type: which units read unlike their siblings.

``shared.fleet`` scores each unit's curve at a few probe readings against the other units of the
type (robust z, ISO 13528); |z| >= 3 raises an action-level ``fleet_outlier`` flag, 2 < |z| < 3
a warning. Every unit of the type takes part, so this is the one flag whose cost grows with the
fleet. It is therefore kept apart from a calibration's own work:

- Each change of a unit's current calibration (a save, a void, a refit) stores what the
  comparison needs on the unit row (``keep_curve``): the current session and fit, the fit's
  valid range, and the curve at the type's current probe readings.
- The comparison itself runs as a background job per type (``queue``, coalesced: a burst of
  saves gives one job). It reads those stored values with one query, evaluates a stored fit
  again only for units whose stored values are at other probe readings (the common valid range
  moved), scores with ``shared.fleet.score_fleet`` (the same numbers as ``fleet_outliers`` on the
  fits), and writes the type's fleet flags in one short transaction.
- A type edit, a refit and the demo load compare at once (``recompute_fleet``), in their own
  transaction.

Two comparisons of one type never write at the same time: the write locks the type's row
(PostgreSQL, FOR NO KEY UPDATE, which leaves saves free to queue the next job) or holds the write
lock (SQLite); the job queue runs one job per type at a time.
A change committed after a job read the fleet queues the next job, so the flags catch up.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import Table, bindparam, select, update
from sqlalchemy.orm import Session

import shared
from server.calibrations.models import CalibrationSession, FitRecord
from server.db import json_safe, utcnow
from server.flags.models import Flag, FlagKind, Severity
from server.fleet.models import SensorType, Unit, UnitStatus
from server.jobs import service as jobs
from server.jobs.models import JobKind
from server.jobs.runner import JobContext
from shared.fleet import FleetResult, choose_probes, score_fleet

log = logging.getLogger("sensorledger.fleet")
LOAD_CHUNK = 500  # stored fits read per query when probe readings moved


def _g(x: float, digits: int = 3) -> str:
    return f"{x:.{digits}g}"


# -- what each unit keeps --------------------------------------------------------------------------


def curve_at(fit: shared.Fit, probes: list[float] | None) -> dict[str, Any] | None:
    """The curve at the probe readings, when the fit's valid range covers them."""
    if not probes:
        return None
    lo, hi = fit.valid_range
    if min(probes) < lo or max(probes) > hi:
        return None
    values = fit.to_value(np.asarray(probes, dtype=float))
    return {"probes": list(probes), "values": [float(v) for v in values]}


def keep_curve(unit: Unit, current: CalibrationSession | None, sensor_type: SensorType) -> None:
    """Store on the unit what the fleet comparison needs of its current calibration (none:
    the unit takes no part)."""
    record = current.current_fit if current is not None else None
    if current is None or record is None or unit.status is UnitStatus.retired:
        unit.fleet_session_id = unit.fleet_fit_id = None
        unit.fleet_lo = unit.fleet_hi = None
        unit.fleet_values = None
        return
    if unit.fleet_fit_id == record.id and unit.fleet_values is not None:
        stored = unit.fleet_values.get("probes")
        if stored == sensor_type.fleet_probes:
            return
    fit = shared.Fit.from_dict(record.result)
    unit.fleet_session_id, unit.fleet_fit_id = current.id, record.id
    unit.fleet_lo, unit.fleet_hi = (float(v) for v in fit.valid_range)
    unit.fleet_values = curve_at(fit, sensor_type.fleet_probes)


def queue(session: Session, sensor_type: SensorType) -> None:
    """Queue the type's fleet comparison (folded into one already queued). Call it last before
    the commit: the queued job stays locked until then."""
    jobs.enqueue_once(
        session,
        JobKind.fleet,
        jobs.fleet_key(sensor_type.id),
        f"compare the units of {sensor_type.name}",
        sensor_type_id=sensor_type.id,
    )


def catching_up(session: Session, sensor_type: SensorType) -> bool:
    """Is a fleet comparison of the type queued or running?"""
    return jobs.pending(session, JobKind.fleet, sensor_type.id)


# -- the comparison --------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Member:
    unit_id: int
    serial: str
    session_id: int
    fit_id: int
    lo: float
    hi: float
    stored: dict[str, Any] | None


@dataclass(frozen=True, slots=True)
class Comparison:
    """A fleet comparison computed from a snapshot, ready to be written."""

    sensor_type_id: int
    probes: list[float] | None
    result: FleetResult | None
    members: dict[str, Member]
    refreshed: dict[int, tuple[int, dict[str, Any]]]  # unit id -> (fit id, new stored values)


def members_of(session: Session, sensor_type_id: int) -> list[Member]:
    """The units that take part: not retired, with a current calibration (one query)."""
    rows = session.execute(
        select(
            Unit.id,
            Unit.serial,
            Unit.fleet_session_id,
            Unit.fleet_fit_id,
            Unit.fleet_lo,
            Unit.fleet_hi,
            Unit.fleet_values,
        )
        .where(
            Unit.sensor_type_id == sensor_type_id,
            Unit.status != UnitStatus.retired,
            Unit.fleet_fit_id.is_not(None),
        )
        .order_by(Unit.serial)
    )
    return [
        Member(uid, serial, sid, fid, float(lo), float(hi), values)
        for uid, serial, sid, fid, lo, hi, values in rows
        if sid is not None and fid is not None and lo is not None and hi is not None
    ]


def _load_fits(session: Session, fit_ids: Iterable[int]) -> dict[int, shared.Fit]:
    ids = list(fit_ids)
    out: dict[int, shared.Fit] = {}
    for i in range(0, len(ids), LOAD_CHUNK):
        for fid, result in session.execute(
            select(FitRecord.id, FitRecord.result).where(FitRecord.id.in_(ids[i : i + LOAD_CHUNK]))
        ):
            out[fid] = shared.Fit.from_dict(result)
    return out


def compare(session: Session, sensor_type_id: int) -> Comparison:
    """Score the type's units from what they store; nothing is written."""
    members = {m.serial: m for m in members_of(session, sensor_type_id)}
    if len(members) < 2:
        return Comparison(sensor_type_id, None, None, members, {})
    try:
        probes_arr, basis, skipped = choose_probes({s: (m.lo, m.hi) for s, m in members.items()})
    except shared.CalibrationError:
        return Comparison(sensor_type_id, None, None, members, {})
    probes = [float(p) for p in probes_arr]
    values: dict[str, list[float]] = {}
    stale: list[Member] = []
    for serial, m in members.items():
        if serial in skipped:
            continue
        if m.stored is not None and m.stored.get("probes") == probes:
            values[serial] = m.stored["values"]
        else:
            stale.append(m)
    refreshed: dict[int, tuple[int, dict[str, Any]]] = {}
    fits = _load_fits(session, (m.fit_id for m in stale))
    for m in stale:
        fit = fits.get(m.fit_id)
        if fit is None:  # the fit went since the snapshot; the next comparison sees it
            skipped[m.serial] = "its calibration changed during the comparison"
            continue
        curve = curve_at(fit, probes)
        if curve is None:
            skipped[m.serial] = "valid range does not cover the probe readings"
            continue
        values[m.serial] = curve["values"]
        refreshed[m.unit_id] = (m.fit_id, curve)
    try:
        result = score_fleet(values, probes_arr, basis, skipped)
    except shared.CalibrationError:
        result = None
    return Comparison(sensor_type_id, probes, result, members, refreshed)


def _found(comparison: Comparison, st: SensorType) -> dict[str, tuple[int, Severity, str, Any]]:
    """key -> (unit id, severity, message, evidence) of every outlier the comparison found."""
    result = comparison.result
    out: dict[str, tuple[int, Severity, str, Any]] = {}
    if result is None:
        return out
    for serial, score in result.units.items():
        if score.level not in ("action", "warning"):
            continue
        m = comparison.members[serial]
        row = result.serials.index(serial)
        j = int(np.argmin(np.abs(result.probe_readings - score.at_reading)))
        centre = float(result.center[j])
        key = f"fleet_outlier:{m.unit_id}:{m.session_id}"
        message = (
            f"reads unlike its {len(result.serials) - 1} siblings: robust z "
            f"{score.z_at_max:+.2f} at {_g(score.at_reading, 4)} {st.reading_unit} "
            f"({_g(score.value_at_max, 4)} {st.value_unit} against the median "
            f"{_g(centre, 4)} {st.value_unit})"
        )
        evidence = json_safe(
            {
                "session_id": m.session_id,
                "z": score.z_at_max,
                "at_reading": score.at_reading,
                "value": score.value_at_max,
                "center": centre,
                "scale": float(result.scale[j]),
                "units_compared": len(result.serials),
                "probe_readings": result.probe_readings,
                # this unit at each probe (for the plot): its value, the fleet's robust centre
                # and scale there, and its robust z
                "probe_values": result.values[row],
                "probe_center": result.center,
                "probe_scale": result.scale,
                "probe_z": result.z[row],
                "rule": result.rule,
                "value_unit": st.value_unit,
                "reading_unit": st.reading_unit,
            }
        )
        severity = Severity.action if score.level == "action" else Severity.warning
        out[key] = (m.unit_id, severity, message, evidence)
    return out


def write(session: Session, comparison: Comparison) -> list[Flag]:
    """Store a comparison: the refreshed curves (only where the unit still has the fit they
    were computed from), the type's probe readings, and its fleet flags raised, refreshed or
    closed. The open fleet flags."""
    # FOR NO KEY UPDATE (PostgreSQL): two writes of one type take turns, but a save of one of
    # its units may still queue the next job (the job row's foreign key takes KEY SHARE on this
    # row) while this write waits for that unit's row lock; FOR UPDATE deadlocked them
    st = session.scalar(
        select(SensorType)
        .where(SensorType.id == comparison.sensor_type_id)
        .with_for_update(key_share=True)
    )
    if st is None:
        return []
    if comparison.refreshed:
        table = Unit.__table__
        assert isinstance(table, Table)
        session.execute(
            update(table)
            .where(table.c.id == bindparam("uid"), table.c.fleet_fit_id == bindparam("fid"))
            .values(fleet_values=bindparam("curve")),
            [
                {"uid": uid, "fid": fid, "curve": curve}
                for uid, (fid, curve) in comparison.refreshed.items()
            ],
        )
    st.fleet_probes = comparison.probes
    now = utcnow()
    st.fleet_checked_at = now
    found = _found(comparison, st)
    existing = {
        f.key: f
        for f in session.scalars(
            select(Flag)
            .join(Flag.unit)
            .where(Unit.sensor_type_id == st.id, Flag.kind == FlagKind.fleet_outlier)
        )
    }
    for key, gone in existing.items():
        if key not in found and gone.open:
            gone.open, gone.closed_at = False, now
    kept = []
    for key, (unit_id, severity, message, evidence) in found.items():
        flag = existing.get(key)
        if flag is None:
            flag = Flag(unit_id=unit_id, kind=FlagKind.fleet_outlier, key=key, raised_at=now)
            session.add(flag)
        flag.severity, flag.message, flag.evidence = severity, message, evidence
        flag.open, flag.closed_at = True, None
        kept.append(flag)
    session.flush()
    return kept


def recompute_fleet(session: Session, sensor_type: SensorType) -> list[Flag]:
    """Compare the type's units now, in the caller's transaction (type edits, refits, the demo
    load); the open fleet flags."""
    session.flush()
    return write(session, compare(session, sensor_type.id))


def run_fleet_job(ctx: JobContext) -> None:
    """The fleet job's handler: read and score outside any write transaction, then write the
    flags and finish the job in one short transaction."""
    with ctx.read_factory() as s:
        job = jobs.get_job(s, ctx.job_id)
        sensor_type_id = job.sensor_type_id
        comparison = compare(s, sensor_type_id) if sensor_type_id is not None else None
    ctx.stopping()
    with ctx.factory() as s:
        job = ctx.hold(s)
        opened = write(s, comparison) if comparison is not None else []
        n = len(comparison.members) if comparison is not None else 0
        job.total = job.done = n
        jobs.finish(
            job, f"compared {n} unit{'s' if n != 1 else ''}; {len(opened)} read unlike the rest"
        )
        s.commit()
