"""What "Needs attention" reads: counts of open flags by kind and severity (one grouped query) and
one page of flags in the order the page shows them.

The order: open actions, then open warnings, then (``show=all``) closed flags; by kind within each
(``FlagKind`` order), those nobody acknowledged first, newest first. Consecutive flags of one
section and kind form a group on the page, so a group may continue on the next page.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field

from sqlalchemy import case, func, select
from sqlalchemy.orm import Session, joinedload

from server.flags.models import Flag, FlagKind, Severity
from server.pagination import PageParams, paged


class Section(enum.StrEnum):
    """Where a flag sits on the page: its severity while open, else closed."""

    action = "action"
    warning = "warning"
    closed = "closed"


SECTION_ORDER = case((Flag.open.is_(False), 2), (Flag.severity == Severity.action, 0), else_=1)
KIND_ORDER = case({kind: i for i, kind in enumerate(FlagKind)}, value=Flag.kind)


def section_of(flag: Flag) -> Section:
    return Section(flag.severity.value) if flag.open else Section.closed


@dataclass(frozen=True, slots=True)
class Counts:
    """Open flags by (kind, severity), and those of them nobody acknowledged."""

    open: dict[tuple[FlagKind, Severity], int] = field(default_factory=dict)
    waiting: dict[tuple[FlagKind, Severity], int] = field(default_factory=dict)

    def of(self, kind: FlagKind | None = None, severity: Severity | None = None) -> int:
        return sum(
            n for (k, s), n in self.open.items() if kind in (None, k) and severity in (None, s)
        )

    def waiting_of(self, kind: FlagKind | None = None, severity: Severity | None = None) -> int:
        return sum(
            n for (k, s), n in self.waiting.items() if kind in (None, k) and severity in (None, s)
        )


def count_open(session: Session) -> Counts:
    """Open flags by kind and severity, and how many of each wait for an acknowledgement."""
    rows = session.execute(
        select(Flag.kind, Flag.severity, func.count(), func.count(Flag.acknowledged_at))
        .where(Flag.open.is_(True))
        .group_by(Flag.kind, Flag.severity)
    )
    counts = Counts()
    for kind, severity, n, acknowledged in rows:
        counts.open[(kind, severity)] = int(n)
        counts.waiting[(kind, severity)] = int(n) - int(acknowledged)
    return counts


def list_page(
    session: Session,
    page: PageParams,
    *,
    show_closed: bool = False,
    kind: FlagKind | None = None,
    severity: Severity | None = None,
) -> tuple[list[Flag], int]:
    """One page of flags in the page's order (see the module), with their units; the total."""
    query = select(Flag).options(joinedload(Flag.unit))
    if not show_closed:
        query = query.where(Flag.open.is_(True))
    if kind is not None:
        query = query.where(Flag.kind == kind)
    if severity is not None:
        query = query.where(Flag.severity == severity)
    ordered = query.order_by(
        SECTION_ORDER,
        KIND_ORDER,
        Flag.acknowledged_at.is_not(None),
        Flag.raised_at.desc(),
        Flag.id.desc(),
    )
    return paged(session, ordered, page)
