"""Bring a whole calibration history in at once (``sensorledger import-history``, the history API).

The sessions of a history file (``history_csv``) are checked against the database, fitted in
batches (``service.fit_many_points``: the type's families ranked on a whole batch by
``shared.ranking.rank_many``, then judged as a single save judges) and written with bulk inserts,
``BATCH`` sessions per transaction. The stored rows are those ``run_calibration`` stores for the
same points: the session, its points, one current ``FitRecord`` (result, decision, ranking,
diagnostics) and one ``calibration.saved`` audit entry; new units get ``unit.registered``.

Unlike the other services this one COMMITS, once per batch: an import of years of records must
neither hold one transaction (and SQLite's write lock) for minutes nor lose every batch to a fault
in the last. A batch is stored whole or not at all, so each session is; a fault stops the import
with the batches before it stored, and running the same file again skips them (a session whose
unit, performed_at, operator and reference are stored already is skipped and counted). The flags
of every type that got sessions are recomputed once, at the end, with a ``history.imported``
entry summing up the import.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime

from sqlalchemy import insert, select
from sqlalchemy.orm import Session

from server.audit import service as audit
from server.audit.models import AuditEntry
from server.calibrations.history_csv import HistoryFile, PendingSession, Problem
from server.calibrations.models import CalibrationSession, FitRecord, Point, SessionKind
from server.calibrations.service import Outcome, fit_many_points, repeat_indices, type_b_of
from server.flags.service import recompute_flags
from server.fleet.models import SensorType, Unit, UnitStatus

BATCH = 300  # sessions per transaction (and per batched fit)
Key = tuple[int, datetime, str, str]  # unit id, performed_at, operator, reference


@dataclass(slots=True)
class HistoryResult:
    """What an import did; ``problems`` name every row (or session) not stored, by line."""

    source: str
    rows: int = 0
    sessions: int = 0  # sessions in the file
    stored: int = 0
    points: int = 0  # points stored
    skipped: int = 0  # sessions stored already (an earlier import of the same rows)
    rejected: int = 0  # sessions not stored because of a problem
    rejected_rows: int = 0  # the rows of those sessions
    units_created: list[str] = field(default_factory=list)
    flag_types: list[str] = field(default_factory=list)  # types whose flags were recomputed
    problems: list[Problem] = field(default_factory=list)

    def summary(self) -> str:
        """One line for people."""
        new = f", {len(self.units_created):,} new units" if self.units_created else ""
        rejected = (
            f"{self.rejected:,} sessions ({self.rejected_rows:,} rows) rejected, see the report"
            if self.rejected
            else "nothing rejected"
        )
        flags = (
            f"flags recomputed for {', '.join(self.flag_types)}"
            if self.flag_types
            else "no flags to recompute"
        )
        return (
            f"{self.source}: {self.rows:,} rows, {self.sessions:,} sessions: {self.stored:,} "
            f"stored ({self.points:,} points{new}), {self.skipped:,} already present, "
            f"{rejected}; {flags}."
        )


@dataclass(slots=True)
class _UnitRef:
    """A unit of the file: stored (``id``), or to create with its first stored session."""

    id: int | None
    serial: str
    sensor_type: SensorType


@dataclass(slots=True)
class _Checked:
    """A session ready to fit, with its type and unit."""

    pending: PendingSession
    sensor_type: SensorType
    unit: _UnitRef


def import_history(
    session: Session,
    parsed: HistoryFile,
    *,
    actor: str | None,
    source: str,
    batch: int = BATCH,
    on_progress: Callable[[int], None] | None = None,
    on_stage: Callable[[str], None] | None = None,
) -> HistoryResult:
    """Store the sessions of ``parsed``, BATCH per commit; recompute flags at the end (see the
    module docstring). ``on_progress(n)`` is told of every n sessions dealt with (stored,
    skipped or rejected), ``on_stage(text)`` of the step being taken."""
    result = HistoryResult(source=source, rows=parsed.rows, sessions=len(parsed.sessions))
    progress = on_progress or (lambda n: None)
    stage = on_stage or (lambda text: None)
    ready = _check(session, parsed.sessions, result)
    progress(result.rejected)
    touched: dict[int, SensorType] = {}
    stage("fitting and storing sessions")
    for start in range(0, len(ready), batch):
        chunk = ready[start : start + batch]
        stored = _store_batch(session, chunk, result, actor=actor, source=source)
        session.commit()
        touched.update({c.sensor_type.id: c.sensor_type for c in stored})
        progress(len(chunk))
    session.expire_all()  # the flags read what the bulk inserts wrote
    for sensor_type in sorted(touched.values(), key=lambda t: t.name):
        stage(f"recomputing the flags of {sensor_type.name}")
        recompute_flags(session, sensor_type)
        result.flag_types.append(sensor_type.name)
    result.problems.sort(key=lambda p: p.line)
    audit.record(
        session,
        actor,
        "history.imported",
        "history",
        source[:128],
        f"history imported from {source}: {result.stored} sessions stored, {result.skipped} "
        f"already present, {result.rejected} rejected",
        rows=result.rows,
        sessions=result.sessions,
        stored=result.stored,
        points=result.points,
        skipped=result.skipped,
        rejected=result.rejected,
        rejected_rows=result.rejected_rows,
        units_created=len(result.units_created),
        flag_types=result.flag_types,
    )
    session.commit()
    return result


def _reject(result: HistoryResult, pending: PendingSession, problems: list[Problem]) -> None:
    result.rejected += 1
    result.rejected_rows += len(pending.lines)
    result.problems += problems


def _check(
    session: Session, sessions: list[PendingSession], result: HistoryResult
) -> list[_Checked]:
    """Sessions whose rows all read and whose type and unit fit; the others rejected."""
    types = {t.name: t for t in session.scalars(select(SensorType))}
    by_id = {t.id: t for t in types.values()}
    units = {  # by serial in lower case, as serials are compared
        serial.lower(): _UnitRef(unit_id, serial, by_id[type_id])
        for unit_id, serial, type_id in session.execute(
            select(Unit.id, Unit.serial, Unit.sensor_type_id)
        )
    }
    ready = []
    for pending in sessions:
        if pending.problems:
            _reject(result, pending, [pending.problem(n, why) for n, why in pending.problems])
            continue
        first = pending.lines[0]
        sensor_type = types.get(pending.sensor_type)
        if sensor_type is None:
            known = ", ".join(repr(n) for n in sorted(types)) or "none yet"
            why = f"unknown sensor type {pending.sensor_type!r} (known: {known})"
            _reject(result, pending, [pending.problem(first, why)])
            continue
        unit = units.get(pending.serial.lower())
        if unit is None:  # a unit to create, of this type from here on
            unit = units[pending.serial.lower()] = _UnitRef(None, pending.serial, sensor_type)
        if unit.sensor_type is not sensor_type:
            where = "is" if unit.id is not None else "was given earlier as"
            why = (
                f"unit {unit.serial!r} {where} a {unit.sensor_type.name} unit, not "
                f"{sensor_type.name}"
            )
            _reject(result, pending, [pending.problem(first, why)])
            continue
        ready.append(_Checked(pending, sensor_type, unit))
    return ready


def _present(session: Session, unit_ids: set[int]) -> set[Key]:
    """The keys of the sessions stored already for these units (voided ones too)."""
    if not unit_ids:
        return set()
    rows = session.execute(
        select(
            CalibrationSession.unit_id,
            CalibrationSession.performed_at,
            CalibrationSession.operator,
            CalibrationSession.reference,
        ).where(CalibrationSession.unit_id.in_(unit_ids))
    )
    return {(u, when, operator, reference) for u, when, operator, reference in rows}


def _fit(chunk: Sequence[_Checked]) -> list[Outcome | str]:
    """Each session's outcome, batched per type; a reason for those that cannot be fitted."""
    found: list[Outcome | str] = ["" for _ in chunk]
    by_type: dict[int, list[int]] = defaultdict(list)
    for i, c in enumerate(chunk):
        by_type[c.sensor_type.id].append(i)
    for indices in by_type.values():
        sensor_type = chunk[indices[0]].sensor_type
        inputs = type_b_of(sensor_type, None, 2.0, None, None)
        outcomes = fit_many_points(
            sensor_type,
            [(chunk[i].pending.readings, chunk[i].pending.reference_values) for i in indices],
            [inputs] * len(indices),
        )
        for i, outcome in zip(indices, outcomes, strict=True):
            found[i] = outcome if isinstance(outcome, Outcome) else outcome.message
    return found


def _store_batch(
    session: Session,
    chunk: list[_Checked],
    result: HistoryResult,
    *,
    actor: str | None,
    source: str,
) -> list[_Checked]:
    """Skip what is stored already, fit the rest, insert what fitted; flushed, not committed."""
    present = _present(session, {c.unit.id for c in chunk if c.unit.id is not None})
    fresh = []
    for c in chunk:
        p = c.pending
        assert p.performed_at is not None  # a session whose date did not read was rejected
        if (c.unit.id, p.performed_at, p.operator, p.reference) in present:
            result.skipped += 1
        else:
            fresh.append(c)
    good: list[tuple[_Checked, Outcome]] = []
    for c, outcome in zip(fresh, _fit(fresh), strict=True):
        if isinstance(outcome, str):
            p = c.pending
            _reject(result, p, [p.problem(p.lines[0], f"cannot fit the session: {outcome}")])
        else:
            good.append((c, outcome))
    if not good:
        return []
    _create_units(session, [c for c, _ in good], result, actor=actor, source=source)
    session_rows = [
        {
            "unit_id": c.unit.id,
            "performed_at": c.pending.performed_at,
            "operator": c.pending.operator,
            "reference": c.pending.reference,
            "reference_expanded_u": None,
            "reference_k": 2.0,
            "extra_u": None,
            "extra_label": None,
            "kind": SessionKind(c.pending.kind or SessionKind.periodic.value),
            "ambient": None,
            "notes": c.pending.notes,
            "recorded_by": actor,
        }
        for c, _ in good
    ]
    ids = list(
        session.scalars(
            insert(CalibrationSession).returning(
                CalibrationSession.id, sort_by_parameter_order=True
            ),
            session_rows,
        )
    )
    points, fits, entries = [], [], []
    for session_id, (c, outcome) in zip(ids, good, strict=True):
        p, fitted, decision = c.pending, outcome.fit, outcome.decision
        kind = SessionKind(p.kind or SessionKind.periodic.value)
        repeats = repeat_indices(p.reference_values)
        points += [
            {
                "session_id": session_id,
                "seq": i,
                "reference_value": value,
                "reading": reading,
                "repeat_index": repeats[i],
                "excluded": False,
                "exclude_reason": None,
            }
            for i, (value, reading) in enumerate(zip(p.reference_values, p.readings, strict=True))
        ]
        fits.append(
            {
                "session_id": session_id,
                "family": fitted.family,
                "options": dict(fitted.options),
                "result": fitted.to_dict(),
                "decision": decision.to_dict(),
                "ranking": outcome.ranking,
                "diagnostics": outcome.diagnostics,
                "noise_check": outcome.noise_check,
                "passed": decision.passed,
                "is_current": True,
                "engine_version": fitted.engine_version,
            }
        )
        entries.append(
            audit.entry_of(
                actor,
                "calibration.saved",
                "unit",
                c.unit.serial,
                f"calibration of {p.performed_at:%Y-%m-%d} ({kind.value.replace('_', ' ')})"
                f" saved: {fitted.family}, {'passed' if decision.passed else 'failed'}",
                session_id=session_id,
                performed_at=p.performed_at,
                operator=p.operator,
                reference=p.reference,
                family=fitted.family,
                passed=decision.passed,
                points=len(p.lines),
                engine_version=fitted.engine_version,
                imported_from=source,
            )
        )
    session.execute(insert(Point), points)
    session.execute(insert(FitRecord), fits)
    _add_entries(session, entries)
    result.stored += len(good)
    result.points += len(points)
    return [c for c, _ in good]


def _create_units(
    session: Session,
    checked: list[_Checked],
    result: HistoryResult,
    *,
    actor: str | None,
    source: str,
) -> None:
    """Insert the units these sessions need that do not exist yet; set their ids."""
    new = list({id(c.unit): c.unit for c in checked if c.unit.id is None}.values())
    if not new:
        return
    rows = [
        {"serial": u.serial, "sensor_type_id": u.sensor_type.id, "status": UnitStatus.in_stock}
        for u in new
    ]
    ids = session.scalars(insert(Unit).returning(Unit.id, sort_by_parameter_order=True), rows)
    entries = []
    for unit_id, unit in zip(list(ids), new, strict=True):
        unit.id = unit_id
        result.units_created.append(unit.serial)
        entries.append(
            audit.entry_of(
                actor,
                "unit.registered",
                "unit",
                unit.serial,
                f"{unit.serial} registered ({unit.sensor_type.name})",
                received_on=None,
                notes=None,
                imported_from=source,
            )
        )
    _add_entries(session, entries)


def _add_entries(session: Session, entries: list[AuditEntry]) -> None:
    """Audit entries in one executemany (the values ``audit.record`` would flush one by one)."""
    session.execute(
        insert(AuditEntry),
        [
            {
                "actor": e.actor,
                "action": e.action,
                "subject_kind": e.subject_kind,
                "subject": e.subject,
                "summary": e.summary,
                "detail": e.detail,
            }
            for e in entries
        ],
    )
