"""The demo fleet's reference standards (invented, like everything in ``server.demo``): one for
each sensor type's jig, and a thermometer no unit uses. Dates belong to the demo's story, whose
"today" is ``server.demo.REFERENCE_DATE`` (2026-11-20):

- ``DJ-1`` the distance jig (rangefinders): in date.
- ``IH-2`` the indexing head (potentiometers): due 2026-12-28, soon after the story's today.
- ``DW-20`` the dead-weight set (load cells): checked in tolerance on 2025-11-03, then found out
  of tolerance on 2026-11-18 (one weight knocked): every load cell calibrated against it since
  2025-11-03 gets a ``reference_suspect`` flag, the kit grippers among them.
- ``TH-5`` a reference thermometer: overdue since 2026-10-30.

Sessions name their type's standard (``REFERENCE_OF``), so U and k come from here.
"""

from __future__ import annotations

from datetime import date

from sqlalchemy.orm import Session

from server.standards import service, suspect
from server.standards.models import StandardCheck
from server.standards.schemas import StandardCreate

REFERENCE_OF = {"ir": "DJ-1", "pot": "IH-2", "lc": "DW-20"}  # demo kind -> its standard
SUSPECT = "DW-20"
STANDARDS = (
    StandardCreate(
        name="DJ-1",
        description="distance jig: aluminium rail with stops every 10 mm, white card target",
        quantity="distance",
        value_unit="mm",
        expanded_u=0.2,
        k=2,
        certificate="LRW-CAL-2025-041",
        calibrated_on=date(2025, 4, 10),
        due_on=date(2027, 4, 10),
    ),
    StandardCreate(
        name="IH-2",
        description="indexing head with a 0.1 deg vernier",
        quantity="angle",
        value_unit="deg",
        expanded_u=0.1,
        k=2,
        certificate="LRW-CAL-2025-058",
        calibrated_on=date(2025, 6, 20),
        due_on=date(2026, 12, 28),
    ),
    StandardCreate(
        name="DW-20",
        description="dead-weight set, class M1, 2 kg steps to 20 kg, with its hanger",
        quantity="force",
        value_unit="N",
        expanded_u=0.01,
        k=2,
        certificate="LRW-CAL-2025-033",
        calibrated_on=date(2025, 5, 1),
        due_on=date(2027, 5, 1),
    ),
    StandardCreate(
        name="TH-5",
        description="reference thermometer, 4-wire platinum probe, kept for the thermistor kits",
        quantity="temperature",
        value_unit="degC",
        expanded_u=0.05,
        k=2,
        certificate="LRW-CAL-2024-102",
        calibrated_on=date(2024, 10, 30),
        due_on=date(2026, 10, 30),
    ),
)
CHECKS = (  # (standard, checked_on, in_tolerance, note)
    ("DJ-1", date(2026, 4, 8), True, "stops re-measured with gauge blocks"),
    ("DW-20", date(2025, 11, 3), True, "weights compared with the 2 kg check weight"),
    ("DW-20", date(2026, 11, 18), False, "weight 7 reads 0.4 g light: knocked off the shelf"),
)


def register_standards(session: Session, actor: str) -> None:
    """Register the demo's standards and their in-tolerance checks (before any session)."""
    for data in STANDARDS:
        service.create_standard(session, data, actor)
    _checks(session, actor, failed=False)


def flag_suspect(session: Session, actor: str) -> int:
    """Record the failed check of DW-20 (after the sessions and flags): how many units it
    flagged. The checks are added as rows (their dates are the story's)."""
    return _checks(session, actor, failed=True)


def _checks(session: Session, actor: str, *, failed: bool) -> int:
    flagged = 0
    for name, on, in_tolerance, note in CHECKS:
        if in_tolerance == failed:
            continue
        standard = service.get_standard(session, name)
        check = StandardCheck(
            standard=standard,
            checked_on=on,
            in_tolerance=in_tolerance,
            note=note,
            recorded_by=actor,
        )
        session.add(check)
        session.flush()
        session.refresh(standard, ["checks"])
        found = [d.serial for d in suspect.raise_for_check(session, standard, check)]
        service.record_check(session, standard, check, standard.due_on, sorted(found), actor)
        flagged += len(found)
    return flagged
