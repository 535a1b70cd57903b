"""The /receive page: register a box of units of one type at once, then go and calibrate them."""

from __future__ import annotations

import re
from dataclasses import dataclass, replace
from datetime import UTC, date, datetime
from typing import Annotated, Any
from urllib.parse import quote

from fastapi import APIRouter, Form, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.accounts.deps import PageTechnician
from server.db import SessionDep
from server.errors import Invalid
from server.fleet import receiving, service
from server.fleet.models import Unit
from server.fleet.pages import unit_url
from server.htmx import render

router = APIRouter(include_in_schema=False)

ID_RANGES = re.compile(r"^\d+(-\d+)?(,\d+(-\d+)?)*$")


@dataclass(frozen=True, slots=True)
class ReceiveForm:
    """The batch as typed (kept on a re-render)."""

    sensor_type: str = ""
    received_on: str = ""
    serials: str = ""
    prefix: str = ""
    start: str = "1"
    count: str = ""
    notes: str = ""
    error: str | None = None
    error_field: str | None = None


def calibrate_url(serial: str) -> str:
    return f"/calibrate?unit={quote(serial, safe='')}"


def id_ranges(ids: list[int]) -> str:
    """3,4,5,9 -> "3-5,9": the new units in a short query string."""
    parts: list[str] = []
    ordered = sorted(set(ids))
    i = 0
    while i < len(ordered):
        j = i
        while j + 1 < len(ordered) and ordered[j + 1] == ordered[j] + 1:
            j += 1
        parts.append(str(ordered[i]) if i == j else f"{ordered[i]}-{ordered[j]}")
        i = j + 1
    return ",".join(parts)


def _ids(text: str) -> list[int]:
    if not ID_RANGES.match(text):
        raise Invalid("received: expected unit ids such as 12-21,30", field="received")
    ids: list[int] = []
    for part in text.split(","):
        first, _, last = part.partition("-")
        lo, hi = int(first), int(last or first)
        if hi < lo or hi - lo + len(ids) >= receiving.MAX_BATCH:
            raise Invalid("received: too many or reversed unit ids", field="received")
        ids.extend(range(lo, hi + 1))
    return ids


def _whole(text: str, field: str, what: str) -> int:
    try:
        return int(text.strip())
    except ValueError:
        raise Invalid(f"{what}: “{text.strip()}” is not a whole number", field=field) from None


def _received_on(text: str) -> date | None:
    if not text.strip():
        return None
    try:
        return date.fromisoformat(text.strip())
    except ValueError:
        raise Invalid(
            f"received on: “{text.strip()}” is not a date such as 2026-03-14", field="received_on"
        ) from None


def serials_of(form: ReceiveForm) -> list[str]:
    """The list typed or scanned, else the prefix expanded over start .. start + count - 1."""
    listed = receiving.split_serials(form.serials)
    numbered = form.prefix.strip() or form.count.strip()
    if listed and numbered:
        raise Invalid(
            "give either a list of serials or a prefix and a count, not both "
            "(clear the one you do not mean)",
            field="serials",
        )
    if listed:
        return listed
    if not numbered:
        raise Invalid(
            "give the serials: one per line, or a prefix with the first number and a count",
            field="serials",
        )
    if not form.prefix.strip():
        raise Invalid("give the prefix the numbers follow, e.g. IR-2612-", field="prefix")
    if not form.count.strip():
        raise Invalid("how many units? give the count", field="count")
    start = _whole(form.start or "1", "start", "first number")
    count = _whole(form.count, "count", "count")
    return receiving.expand_serials(form.prefix.strip(), start, count)


def _context(session: Any, form: ReceiveForm, received: list[Unit]) -> dict[str, Any]:
    return {
        "form": form,
        "types": service.list_sensor_types(session),
        "received": received,
        "received_type": received[0].sensor_type.name if received else None,
        "unit_url": unit_url,
        "calibrate_url": calibrate_url,
        "max_batch": receiving.MAX_BATCH,
    }


@router.get("/receive")
def receive_page(
    request: Request,
    session: SessionDep,
    user: PageTechnician,
    received: str = "",
    sensor_type: Annotated[str, Query(alias="type", description="the type preselected")] = "",
) -> HTMLResponse:
    """The batch form; after a batch (``received`` = the new units' ids), the units to
    calibrate next."""
    units = receiving.units_by_id(session, _ids(received)) if received else []
    chosen = sensor_type or (units[0].sensor_type.name if units else "")
    form = ReceiveForm(
        sensor_type=chosen,
        received_on=datetime.now(UTC).date().isoformat(),
    )
    return render(request, "fleet/receive.html", block="receive", **_context(session, form, units))


@router.post("/receive")
def receive(
    request: Request,
    session: SessionDep,
    user: PageTechnician,
    sensor_type: Annotated[str, Form()] = "",
    received_on: Annotated[str, Form()] = "",
    serials: Annotated[str, Form()] = "",
    prefix: Annotated[str, Form()] = "",
    start: Annotated[str, Form()] = "1",
    count: Annotated[str, Form()] = "",
    notes: Annotated[str, Form()] = "",
) -> Response:
    """Register the batch, all or nothing; a form to fix (422) naming what is wrong."""
    form = ReceiveForm(
        sensor_type=sensor_type,
        received_on=received_on,
        serials=serials,
        prefix=prefix,
        start=start,
        count=count,
        notes=notes,
    )
    try:
        if sensor_type not in {t.name for t in service.list_sensor_types(session)}:
            raise Invalid("pick the type of the units received", field="sensor_type")
        units = receiving.receive_units(
            session,
            sensor_type,
            serials_of(form),
            received_on=_received_on(received_on),
            notes=notes.strip() or None,
            actor=user.name,
        )
    except Invalid as exc:
        session.rollback()
        failed = replace(form, error=exc.message, error_field=exc.field)
        return render(
            request,
            "fleet/receive.html",
            block="receive",
            status_code=422,
            **_context(session, failed, []),
        )
    session.commit()
    return RedirectResponse(f"/receive?received={id_ranges([u.id for u in units])}", 303)
