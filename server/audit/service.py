"""Write and read the audit log. Entries are added in the same transaction as the change they
describe (so a change rolled back leaves no entry) and are never updated or deleted.

Actions: ``calibration.saved``, ``calibration.voided``, ``calibration.refitted``,
``unit.registered``, ``unit.updated``, ``unit.installed``, ``unit.removed``,
``sensor_type.created``, ``sensor_type.updated``, ``refit.started``, ``refit.finished``,
``flag.acknowledged``, ``history.imported``, ``standard.registered``, ``standard.checked``,
``user.created``, ``user.role_changed``, ``user.password_changed``, ``user.disabled``,
``user.enabled``, ``token.created``, ``token.revoked``, ``signin.unlocked``
(server/accounts/people.py). Services flush, never commit (the history import, which commits
per batch, adds its entries with its rows: ``entry_of``).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Select, select
from sqlalchemy.orm import Session

from server.audit.models import AuditEntry
from server.db import json_safe
from server.pagination import PageParams, paged

SUMMARY_MAX = 500


def record(
    session: Session,
    actor: str | None,
    action: str,
    subject_kind: str,
    subject: str,
    summary: str,
    **detail: Any,
) -> AuditEntry:
    """Add one entry; flushed with the change it describes."""
    entry = entry_of(actor, action, subject_kind, subject, summary, **detail)
    session.add(entry)
    session.flush()
    return entry


def entry_of(
    actor: str | None, action: str, subject_kind: str, subject: str, summary: str, **detail: Any
) -> AuditEntry:
    """An entry not yet added: for a bulk import that adds many with its rows (``record`` adds
    and flushes one)."""
    return AuditEntry(
        actor=actor,
        action=action,
        subject_kind=subject_kind,
        subject=subject,
        summary=summary[:SUMMARY_MAX],
        detail=json_safe(detail),
    )


def _filtered(
    subject_kind: str | None, subject: str | None, actor: str | None, action: str | None
) -> Select[Any]:
    query = select(AuditEntry)
    if subject_kind:
        query = query.where(AuditEntry.subject_kind == subject_kind)
    if subject:
        query = query.where(AuditEntry.subject == subject)
    if actor:
        query = query.where(AuditEntry.actor == actor)
    if action:
        query = query.where(AuditEntry.action == action)
    return query


def list_entries(
    session: Session,
    page: PageParams,
    *,
    subject_kind: str | None = None,
    subject: str | None = None,
    actor: str | None = None,
    action: str | None = None,
) -> tuple[list[AuditEntry], int]:
    """Entries, newest first."""
    query = _filtered(subject_kind, subject, actor, action)
    return paged(session, query.order_by(AuditEntry.at.desc(), AuditEntry.id.desc()), page)


def entries_of_unit(session: Session, serial: str, limit: int = 50) -> list[AuditEntry]:
    """The unit's entries (its calibrations, events, status, flags), newest first."""
    return list(
        session.scalars(
            _filtered("unit", serial, None, None)
            .order_by(AuditEntry.at.desc(), AuditEntry.id.desc())
            .limit(limit)
        )
    )
