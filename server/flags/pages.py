"""Browser pages: "Needs attention" (counts, then one page of flags grouped by kind; each plot
loaded when it scrolls into view; acknowledge with a note) and the unit page's installation
form."""

from __future__ import annotations

from dataclasses import dataclass, replace
from datetime import UTC, datetime
from enum import Enum
from typing import Annotated, Any, TypeVar
from urllib.parse import parse_qsl, urlencode, urlsplit

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from pydantic import ValidationError
from sqlalchemy.orm import Session

from server.accounts.deps import PageTechnician, PageViewer
from server.accounts.models import ROLE_RANK, Role, User
from server.calibrations.pages import blank_form, unit_context
from server.db import RowId, SessionDep
from server.errors import Invalid
from server.flags import attention, service
from server.flags.attention import Section
from server.flags.charts import drift_figure, errors_figure, outlier_figure
from server.flags.models import EventKind, Flag, FlagKind, Severity
from server.flags.panels import EventForm, unit_panels
from server.flags.schemas import EventCreate
from server.fleet.pages import unit_url
from server.fleet.service import get_unit
from server.htmx import is_partial, render
from server.pagination import PageParams, page_params
from server.standards.attention import attention_context

router = APIRouter(include_in_schema=False)
E = TypeVar("E", bound=Enum)

DEFAULT_PER_PAGE = PageParams().per_page
SECTION_TITLES = {
    Section.action: "Act on these",
    Section.warning: "Warnings: signals to watch",
    Section.closed: "Closed: the condition no longer holds",
}
CHART_LABELS = {
    FlagKind.fleet_outlier: "robust z of this unit against its siblings at each probe reading, "
    "with the warning and action lines",
    FlagKind.drift: "deviation of the newest curve from the previous one against reading, with "
    "the drift limit and the simultaneous band",
    FlagKind.failed_acceptance: "residual at each reference value against the allowed error",
    FlagKind.out_of_tolerance_in_service: "as-found error at each reference value against the "
    "allowed error",
}


@dataclass(frozen=True, slots=True)
class AttentionQuery:
    """What the page shows: open flags or all, one kind and/or severity, which page."""

    show: str = "open"
    kind: FlagKind | None = None
    severity: Severity | None = None
    page: int = 1
    per_page: int = DEFAULT_PER_PAGE

    def url(self, **change: Any) -> str:
        """This view with ``change`` applied; defaults are left out of the query string."""
        q = replace(self, **change)
        query = {
            "show": q.show if q.show != "open" else "",
            "kind": str(q.kind or ""),
            "severity": str(q.severity or ""),
            "page": q.page if q.page != 1 else "",
            "per_page": q.per_page if q.per_page != DEFAULT_PER_PAGE else "",
        }
        encoded = urlencode({k: v for k, v in query.items() if v != ""})
        return f"/attention?{encoded}" if encoded else "/attention"


def _choice(enum_type: type[E], value: str, field: str) -> E | None:
    if not value:
        return None
    try:
        return enum_type(value)
    except ValueError:
        choices = ", ".join(m.value for m in enum_type)
        raise Invalid(f"unknown {field} {value!r}; one of: {choices}", field=field) from None


def attention_query(
    page: Annotated[PageParams, Depends(page_params)],
    show: str = "open",
    kind: str = "",
    severity: str = "",
) -> AttentionQuery:
    """The page's query parameters, checked (422 naming the one at fault)."""
    if show not in ("open", "all"):
        raise Invalid("show is 'open' or 'all'", field="show")
    return AttentionQuery(
        show=show,
        kind=_choice(FlagKind, kind, "kind"),
        severity=_choice(Severity, severity, "severity"),
        page=page.page,
        per_page=page.per_page,
    )


def has_chart(flag: Flag) -> bool:
    """Every kind but overdue (whose evidence is a date) has a plot."""
    return flag.kind in CHART_LABELS


def _figure_json(flag: Flag) -> str | None:
    figure = None
    if flag.kind is FlagKind.drift:
        figure = drift_figure(flag.evidence)
    elif flag.kind is FlagKind.fleet_outlier:
        figure = outlier_figure(flag.evidence)
    elif flag.kind in (FlagKind.out_of_tolerance_in_service, FlagKind.failed_acceptance):
        figure = errors_figure(flag.evidence)
    return figure.to_json() if figure is not None else None


def _card(
    flag: Flag, user: User, back: str, error: str | None = None, note: str = ""
) -> dict[str, Any]:
    """One flag as the page shows it: the flag, whether it has a plot (loaded later), the
    acknowledgement form's state and the page to come back to."""
    return {
        "flag": flag,
        "has_chart": has_chart(flag),
        "error": error,
        "note": note,
        "back": back,
        "can_acknowledge": ROLE_RANK[user.role] >= ROLE_RANK[Role.technician],
        "unit_url": unit_url,
    }


def _counts_context(session: Session, query: AttentionQuery) -> dict[str, Any]:
    counts = attention.count_open(session)
    rows = [
        {
            "kind": kind,
            "title": service.TITLES[kind],
            "abbreviation": service.ABBREVIATIONS[kind],
            "action": counts.of(kind, Severity.action),
            "warning": counts.of(kind, Severity.warning),
            "waiting": counts.waiting_of(kind),
        }
        for kind in FlagKind
    ]
    return {
        "count_rows": rows,
        "open_total": counts.of(),
        "action_total": counts.of(severity=Severity.action),
        "warning_total": counts.of(severity=Severity.warning),
        "waiting": counts.waiting_of(),
        "waiting_action": counts.waiting_of(severity=Severity.action),
        # the warnings heading's count: open warnings under the list's kind filter
        "warning_heading_count": counts.of(query.kind, Severity.warning),
        "query": query,
    }


def _list_context(
    session: Session, user: User, query: AttentionQuery, replaced: dict[str, Any] | None = None
) -> dict[str, Any]:
    """One page of flags in sections (open actions, open warnings, closed) of kind groups."""
    flags, total = attention.list_page(
        session,
        PageParams(page=query.page, per_page=query.per_page),
        show_closed=query.show == "all",
        kind=query.kind,
        severity=query.severity,
    )
    back = query.url()
    sections: list[dict[str, Any]] = []
    for flag in flags:
        section = attention.section_of(flag)
        if not sections or sections[-1]["section"] is not section:
            sections.append({"section": section, "title": SECTION_TITLES[section], "groups": []})
        groups = sections[-1]["groups"]
        if not groups or groups[-1]["kind"] is not flag.kind:
            groups.append(
                {
                    "kind": flag.kind,
                    "title": service.TITLES[flag.kind],
                    "abbreviation": service.ABBREVIATIONS[flag.kind],
                    "cards": [],
                }
            )
        card = (replaced or {}).get(str(flag.id)) or _card(flag, user, back)
        groups[-1]["cards"].append(card)
    offset = (query.page - 1) * query.per_page
    last_page = max(1, -(-total // query.per_page))
    return {
        "sections": sections,
        "total": total,
        "first": offset + 1 if flags else 0,
        "last": offset + len(flags),
        "prev_url": query.url(page=min(query.page - 1, last_page)) if query.page > 1 else None,
        "next_url": query.url(page=query.page + 1) if offset + len(flags) < total else None,
        "query": query,
        "flag_titles": service.TITLES,
        "unit_url": unit_url,
        "chart_labels": CHART_LABELS,
    }


def _page_context(
    session: Session, user: User, query: AttentionQuery, replaced: dict[str, Any] | None = None
) -> dict[str, Any]:
    return {
        **_counts_context(session, query),
        **_list_context(session, user, query, replaced),
        **attention_context(session),  # the register's standards due, overdue or suspect
    }


AttentionQueryDep = Annotated[AttentionQuery, Depends(attention_query)]


@router.get("/attention")
def attention_page(
    request: Request, session: SessionDep, user: PageViewer, query: AttentionQueryDep
) -> HTMLResponse:
    """Needs attention: the counts by kind and severity, then one page of flags (open actions,
    then warnings, then closed ones with ``show=all``) grouped by kind; each plot loads when it
    scrolls into view. htmx (the pager) gets the ``list`` block."""
    return render(
        request, "flags/attention.html", block="list", **_page_context(session, user, query)
    )


@router.get("/attention/flags/{flag_id}/chart")
def flag_chart(
    request: Request, flag_id: RowId, session: SessionDep, user: PageViewer
) -> HTMLResponse:
    """One flag's plot: the ``chart`` block for htmx (when its card scrolls into view), else a
    page with the flag and its plot."""
    flag = service.get_flag(session, flag_id)
    return render(
        request,
        "flags/chart.html",
        block="chart",
        flag=flag,
        figure_json=_figure_json(flag),
        chart_label=CHART_LABELS.get(flag.kind, ""),
        flag_title=service.TITLES[flag.kind],
        unit_url=unit_url,
    )


def _back(text: str) -> str:
    """The attention view to return to (a path on this site under /attention, else its start)."""
    return text if text.startswith("/attention") and "//" not in text else "/attention"


@router.post("/attention/flags/{flag_id}/acknowledge")
def acknowledge(
    request: Request,
    flag_id: RowId,
    session: SessionDep,
    user: PageTechnician,
    note: Annotated[str, Form()] = "",
    back: Annotated[str, Form()] = "/attention",
) -> Response:
    """Acknowledge with a note; htmx gets the flag's card back (and the counts, out of band), a
    plain form the page it came from."""
    back = _back(back)
    flag = service.get_flag(session, flag_id)
    try:
        service.acknowledge(session, flag, note, user.name)
    except Invalid as exc:
        session.rollback()
        flag = service.get_flag(session, flag_id)
        card = _card(flag, user, back, error=exc.message, note=note)
        if is_partial(request):
            return render(
                request, "flags/card.html", block="card", status_code=422, oob=False, **card
            )
        query = _query_of(back)
        ctx = _page_context(session, user, query, replaced={str(flag.id): card})
        return render(request, "flags/attention.html", block="list", status_code=422, **ctx)
    session.commit()
    if is_partial(request):
        return render(
            request,
            "flags/card.html",
            block="card",
            oob=True,
            attention_count=service.count_needing_attention(session),
            **_counts_context(session, _query_of(back)),
            **_card(flag, user, back),
        )
    return RedirectResponse(f"{back}#flag-{flag.id}", status_code=303)


def _query_of(url: str) -> AttentionQuery:
    """The attention view an ``AttentionQuery.url`` names (what cannot be read: the default)."""
    params = dict(parse_qsl(urlsplit(url).query))
    try:
        page = PageParams(
            page=max(1, int(params.get("page", 1))),
            per_page=min(500, max(1, int(params.get("per_page", DEFAULT_PER_PAGE)))),
        )
        return attention_query(
            page, params.get("show", "open"), params.get("kind", ""), params.get("severity", "")
        )
    except (ValueError, Invalid):
        return AttentionQuery()


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
