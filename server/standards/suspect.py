"""``reference_suspect`` flags: a standard found out of tolerance puts at risk every unit whose
current calibration used it since it was last known good.

- Raised by ``raise_for_check`` when a check with ``in_tolerance`` false is recorded: one flag
  (action) per unit at risk, keyed by the standard and the calibration, with the standard, its
  certificate, the dates and where the unit is installed. A second failed check finds the same
  keys and raises nothing new.
- Kept by ``refresh``, called at the end of every ``recompute_flags`` (a calibration, void,
  event or status change): a flag is open while the calibration it names is still the unit's
  current one, and closes when the unit is recalibrated (against another standard, or this one
  once it is known good again: a session with a suspect standard does not pass anyway); a void
  that makes the flagged calibration current again opens it again. A retired unit's flags close.
  A later in-tolerance check of the standard changes none of them.
"""

from __future__ import annotations

from datetime import date

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.db import utcnow
from server.flags.models import Flag, FlagKind, Severity
from server.fleet.models import SensorType, Unit, UnitStatus
from server.standards.models import ReferenceStandard, StandardCheck
from server.standards.schemas import CheckCreate
from server.standards.service import (
    Dependent,
    add_check,
    at_risk,
    dependents,
    last_good_on,
    record_check,
)


def key_of(standard_id: int, calibration_id: int) -> str:
    return f"reference_suspect:{standard_id}:{calibration_id}"


def check_standard(
    session: Session, standard: ReferenceStandard, data: CheckCreate, actor: str | None
) -> tuple[StandardCheck, list[str]]:
    """Record a check of the standard, raise the flags a failed one raises and keep it in the
    audit log; the check and the serials of the units newly flagged."""
    due_before = standard.due_on
    check = add_check(session, standard, data, actor)
    flagged = sorted(d.serial for d in raise_for_check(session, standard, check))
    record_check(session, standard, check, due_before, flagged, actor)
    return check, flagged


def raise_for_check(
    session: Session, standard: ReferenceStandard, check: StandardCheck
) -> list[Dependent]:
    """Flag the units a failed check put at risk (see the module); those newly flagged."""
    if check.in_tolerance:
        return []
    since = last_good_on(standard, check.checked_on, exclude=check.id)
    risky = at_risk(standard, dependents(session, standard), since)
    keys = {key_of(standard.id, d.calibration_id): d for d in risky}
    known = (
        set(session.scalars(select(Flag.key).where(Flag.key.in_(list(keys))))) if keys else set()
    )
    now = utcnow()
    raised = []
    for key, d in keys.items():
        if key in known:
            continue
        flag = Flag(
            unit_id=d.unit_id,
            kind=FlagKind.reference_suspect,
            severity=Severity.action,
            key=key,
            message=_message(standard, check, since, d),
            evidence=_evidence(standard, check, since, d),
            raised_at=now,
            open=True,
        )
        session.add(flag)
        raised.append(d)
    session.flush()
    return raised


def _message(standard: ReferenceStandard, check: StandardCheck, since: date, d: Dependent) -> str:
    where = f", installed in {d.installed_in}" if d.installed_in else ""
    return (
        f"calibrated on {d.calibrated_at:%Y-%m-%d} against {standard.name}, which was found out "
        f"of tolerance on {check.checked_on:%Y-%m-%d} (last known good {since:%Y-%m-%d})"
        f"{where}: check or recalibrate the unit against another standard"
    )


def _evidence(
    standard: ReferenceStandard, check: StandardCheck, since: date, d: Dependent
) -> dict[str, object]:
    return {
        "standard": standard.name,
        "certificate": standard.certificate,
        "check_id": check.id,
        "failed_on": check.checked_on.isoformat(),
        "check_note": check.note,
        "last_good_on": since.isoformat(),
        "calibration_id": d.calibration_id,
        "calibrated_at": d.calibrated_at.isoformat(),
        "installed_in": d.installed_in,
        "status": d.status.value,
    }


def refresh(session: Session, sensor_type: SensorType, only: set[int] | None) -> list[Flag]:
    """Open or close the type's (or ``only`` those units') reference_suspect flags by whether
    the calibration each names is still its unit's current one (``Unit.fleet_session_id``, as
    ``recompute_flags`` has just stored it); the open ones. One query when there are none."""
    query = (
        select(Flag, Unit.fleet_session_id, Unit.status)
        .join(Unit, Unit.id == Flag.unit_id)
        .where(Flag.kind == FlagKind.reference_suspect)
    )
    if only is None:
        query = query.where(Unit.sensor_type_id == sensor_type.id)
    else:
        query = query.where(Flag.unit_id.in_(only))
    now = utcnow()
    kept = []
    for flag, current, status in session.execute(query).all():
        holds = status is not UnitStatus.retired and flag.evidence.get("calibration_id") == current
        if holds and not flag.open:
            flag.open, flag.closed_at = True, None
        elif not holds and flag.open:
            flag.open, flag.closed_at = False, now
        if holds:
            kept.append(flag)
    session.flush()
    return kept
