"""Receiving a batch of units (all or nothing) and the units still waiting for a first calibration.

Services flush, never commit: the route owns the transaction.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Iterable, Sequence
from datetime import date

from pydantic import ValidationError
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.calibrations.models import CalibrationSession
from server.errors import Invalid
from server.fleet.models import Unit, UnitStatus
from server.fleet.schemas import UnitCreate
from server.fleet.service import create_unit

MAX_BATCH = 1000  # units in one batch
MIN_DIGITS = 2  # IR-2612-01, not IR-2612-1
NAMED = 12  # serials named in one error message before "and N more"
LOOKUP_CHUNK = 500  # serials per IN (...) when looking for existing ones
SERIAL_SEPARATORS = re.compile(r"[\s,;]+")


def split_serials(text: str) -> list[str]:
    """Serials typed or scanned one per line (commas, semicolons or spaces also separate)."""
    return [s for s in SERIAL_SEPARATORS.split(text) if s]


def expand_serials(prefix: str, start: int, count: int) -> list[str]:
    """``prefix`` + start .. start + count - 1, zero-padded to the width of the largest number
    (at least two digits): ``IR-2612-``, 1, 10 -> IR-2612-01 .. IR-2612-10."""
    if count < 1 or count > MAX_BATCH:
        raise Invalid(f"the count must be 1 to {MAX_BATCH}; got {count}", field="count")
    if start < 0:
        raise Invalid(f"the first number cannot be negative; got {start}", field="start")
    width = max(MIN_DIGITS, len(str(start + count - 1)))
    return [f"{prefix}{n:0{width}d}" for n in range(start, start + count)]


def _named(serials: Sequence[str]) -> str:
    shown = ", ".join(serials[:NAMED])
    more = len(serials) - NAMED
    return f"{shown} and {more} more" if more > 0 else shown


def _existing(session: Session, serials: Sequence[str]) -> list[str]:
    """The stored serials equal to one of ``serials``, ignoring case (as a scanner's lookup)."""
    lowered = sorted({s.lower() for s in serials})
    found: list[str] = []
    for i in range(0, len(lowered), LOOKUP_CHUNK):
        chunk = lowered[i : i + LOOKUP_CHUNK]
        found.extend(session.scalars(select(Unit.serial).where(func.lower(Unit.serial).in_(chunk))))
    return sorted(found)


def receive_units(
    session: Session,
    sensor_type: str,
    serials: Sequence[str],
    *,
    received_on: date | None,
    notes: str | None,
    actor: str | None,
) -> list[Unit]:
    """Register every serial as a unit of ``sensor_type`` in stock, or none of them.

    A serial stored already or repeated in the batch (ignoring case) is an Invalid naming each;
    nothing is added then. Each unit is created by ``create_unit`` (with its audit entry).
    """
    if not serials:
        raise Invalid("give the serials of the units received", field="serials")
    if len(serials) > MAX_BATCH:
        raise Invalid(
            f"{len(serials)} serials: at most {MAX_BATCH} units in one batch", field="serials"
        )
    counts = Counter(s.lower() for s in serials)
    repeated = [s for s in dict.fromkeys(serials) if counts[s.lower()] > 1]
    existing = _existing(session, serials)
    problems = []
    if existing:
        problems.append(
            f"{len(existing)} exist{'s' if len(existing) == 1 else ''} already: {_named(existing)}"
        )
    if repeated:
        problems.append(
            f"{len(repeated)} {'is' if len(repeated) == 1 else 'are'} repeated in the list: "
            f"{_named(repeated)}"
        )
    if problems:
        raise Invalid(
            "nothing was received: of the serials given, " + "; ".join(problems), field="serials"
        )
    requests = []
    for serial in serials:
        try:
            requests.append(
                UnitCreate(
                    serial=serial, sensor_type=sensor_type, received_on=received_on, notes=notes
                )
            )
        except ValidationError as exc:
            first = exc.errors()[0]
            where = str(first["loc"][0]) if first["loc"] else "serial"
            message = str(first["msg"]).removeprefix("Value error, ")
            raise Invalid(
                f"nothing was received: {where} “{serial[:80]}”: {message}",
                field="notes" if where == "notes" else "serials",
            ) from None
    return [create_unit(session, request, actor=actor) for request in requests]


def units_by_id(session: Session, ids: Iterable[int]) -> list[Unit]:
    """The units with these ids, by serial; ids that do not exist are left out."""
    wanted = sorted(set(ids))
    found: list[Unit] = []
    for i in range(0, len(wanted), LOOKUP_CHUNK):
        chunk = wanted[i : i + LOOKUP_CHUNK]
        found.extend(session.scalars(select(Unit).where(Unit.id.in_(chunk))))
    return sorted(found, key=lambda u: u.serial)


def awaiting_first_calibration(session: Session, limit: int) -> tuple[list[Unit], int]:
    """Units with no calibration on record (retired ones left out), the latest received first;
    at most ``limit`` of them, and how many there are in all."""
    query = (
        select(Unit)
        .where(Unit.status != UnitStatus.retired)
        .where(~select(CalibrationSession.id).where(CalibrationSession.unit_id == Unit.id).exists())
    )
    total = session.scalar(select(func.count()).select_from(query.subquery())) or 0
    units = session.scalars(
        query.order_by(Unit.received_on.desc().nulls_last(), Unit.serial).limit(limit)
    )
    return list(units), total
