"""The register's part of Needs attention: standards overdue, due within 30 days, or found out
of tolerance by their latest check (the reference_suspect flags themselves are unit flags and
are listed with the others)."""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session

from server.db import utcnow
from server.standards import service
from server.standards.pages import STANDING_WORDS, standard_url


def attention_context(session: Session) -> dict[str, Any]:
    """What web/templates/standards/attention.html shows (one query, and one for the checks)."""
    today = utcnow().date()
    return {
        "standards_attention": [
            (s, service.standing_of(s, today), service.last_check(s, today))
            for s in service.needing_attention(session, today)
        ],
        "standard_words": STANDING_WORDS,
        "standard_url": standard_url,
        "standards_today": today,
        "due_soon_days": service.DUE_SOON_DAYS,
    }
