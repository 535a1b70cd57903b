"""Browser pages: "Needs attention" (flags by kind, acknowledge with a note) and the unit page's
installation form."""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime
from typing import Annotated, Any

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from pydantic import ValidationError

from server.accounts.deps import PageTechnician, PageViewer
from server.accounts.models import ROLE_RANK, Role, User
from server.calibrations.pages import blank_form, unit_context
from server.db import SessionDep
from server.errors import Invalid
from server.flags import service
from server.flags.charts import drift_figure, errors_figure, outlier_figure
from server.flags.models import EventKind, Flag, FlagKind
from server.flags.panels import EventForm, unit_panels
from server.flags.schemas import EventCreate
from server.fleet.pages import unit_url
from server.fleet.service import get_unit
from server.htmx import is_partial, render
from server.pagination import PageParams

router = APIRouter(include_in_schema=False)

ATTENTION_LIMIT = 500  # flags shown on the page at most


def _card(flag: Flag, user: User, error: str | None = None, note: str = "") -> dict[str, Any]:
    """One flag as the page shows it: the flag, its plot (every kind but overdue, whose
    evidence is a date), the form's state."""
    figure = None
    if flag.kind is FlagKind.drift:
        figure = drift_figure(flag.evidence)
    elif flag.kind is FlagKind.fleet_outlier:
        figure = outlier_figure(flag.evidence)
    elif flag.kind in (FlagKind.out_of_tolerance_in_service, FlagKind.failed_acceptance):
        figure = errors_figure(flag.evidence)
    return {
        "flag": flag,
        "figure_json": figure.to_json() if figure is not None else None,
        "error": error,
        "note": note,
        "can_acknowledge": ROLE_RANK[user.role] >= ROLE_RANK[Role.technician],
    }


def _cards_context(session: Any, user: User, show: str) -> dict[str, Any]:
    flags, total = service.list_flags(
        session,
        PageParams(page=1, per_page=ATTENTION_LIMIT),
        open_=None if show == "all" else True,
    )
    groups = []
    for kind in FlagKind:
        of_kind = [f for f in flags if f.kind is kind]
        of_kind.sort(
            key=lambda f: (
                not f.open,
                f.acknowledged_at is not None,
                f.severity.value != "action",
                f.unit.serial,
            )
        )
        groups.append(
            {
                "kind": kind,
                "title": service.TITLES[kind],
                "abbreviation": service.ABBREVIATIONS[kind],
                "cards": [_card(f, user) for f in of_kind],
                "waiting": sum(1 for f in of_kind if f.open and f.acknowledged_at is None),
            }
        )
    return {
        "groups": groups,
        "show": show,
        "total": total,
        "shown": len(flags),
        "waiting": sum(g["waiting"] for g in groups),
        "unit_url": unit_url,
        "any_drift": any(g["cards"] for g in groups if g["kind"] is FlagKind.drift),
    }


@router.get("/attention")
def attention(
    request: Request, session: SessionDep, user: PageViewer, show: str = "open"
) -> HTMLResponse:
    """Needs attention: flags grouped by kind with their evidence; ``show=all`` adds closed ones."""
    if show not in ("open", "all"):
        raise Invalid("show is 'open' or 'all'", field="show")
    return render(
        request,
        "flags/attention.html",
        block="groups",
        **_cards_context(session, user, show),
    )


@router.post("/attention/flags/{flag_id}/acknowledge")
def acknowledge(
    request: Request,
    flag_id: int,
    session: SessionDep,
    user: PageTechnician,
    note: Annotated[str, Form()] = "",
) -> Response:
    """Acknowledge with a note; htmx gets the flag's card back, a plain form the page."""
    flag = service.get_flag(session, flag_id)
    try:
        service.acknowledge(session, flag, note, user.name)
    except Invalid as exc:
        session.rollback()
        flag = service.get_flag(session, flag_id)
        card = _card(flag, user, error=exc.message, note=note)
        ctx = _cards_context(session, user, "open")
        for group in ctx["groups"]:
            group["cards"] = [card if c["flag"].id == flag.id else c for c in group["cards"]]
        return render(request, "flags/attention.html", block="groups", status_code=422, **ctx)
    session.commit()
    if is_partial(request):
        return render(
            request,
            "flags/attention.html",
            block="groups",
            attention_count=service.count_needing_attention(session),
            **_cards_context(session, user, "open"),
        )
    return RedirectResponse(f"/attention#flag-{flag.id}", status_code=303)


def _event_at(text: str) -> datetime:
    try:
        when = datetime.fromisoformat(text.strip())
    except ValueError:
        raise Invalid("give the date and time (UTC), e.g. 2026-03-14T09:30", field="at") from None
    return when.replace(tzinfo=UTC) if when.tzinfo is None else when


@router.post("/units/{serial}/events")
def add_event(
    request: Request,
    serial: str,
    session: SessionDep,
    user: PageTechnician,
    kind: Annotated[str, Form()] = "",
    location: Annotated[str, Form()] = "",
    at: Annotated[str, Form()] = "",
    note: Annotated[str, Form()] = "",
) -> Response:
    """Install the unit at a location or remove it; back to the unit page (422 with the form to
    fix when it cannot be recorded)."""
    unit = get_unit(session, serial)
    form = EventForm(kind=kind, location=location, at=at, note=note)
    try:
        if kind not in EventKind.__members__:
            raise Invalid("choose installed or removed", field="kind")
        try:
            data = EventCreate(
                kind=EventKind(kind),
                location=location.strip() or None,
                at=_event_at(at),
                note=note.strip() or None,
            )
        except ValidationError as exc:
            first = exc.errors()[0]
            field = ".".join(str(p) for p in first["loc"])
            raise Invalid(f"{field}: {first['msg']}", field=field) from None
        service.create_event(session, unit, data, recorded_by=user.name)
        service.recompute_flags(session, unit.sensor_type, units=[unit])
    except Invalid as exc:
        session.rollback()
        unit = get_unit(session, serial)
        failed = replace(form, error=exc.message, error_field=exc.field)
        ctx = unit_context(unit, user, blank_form(unit, user))
        ctx.update(unit_panels(unit, failed))
        partial = is_partial(request)
        return render(
            request,
            "flags/unit_panels.html" if partial else "units/page.html",
            block="installations" if partial else "unit",
            status_code=422,
            **ctx,
        )
    session.commit()
    target = f"{unit_url(unit.serial)}#installations"
    if is_partial(request):
        return Response(status_code=200, headers={"HX-Redirect": target, "Vary": "HX-Request"})
    return RedirectResponse(target, status_code=303)
