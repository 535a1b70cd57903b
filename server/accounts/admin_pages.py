"""/admin/people: an admin lists people, their tokens and failed sign-ins, and changes them (the
same service as `sensorledger user ...` and `token ...`: server/accounts/people.py). Every form
posts, then 303 back to the page with what was done; a refused change shows the page again with
the reason (409/422) and changes nothing."""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated
from urllib.parse import urlencode

from fastapi import APIRouter, Form, Query, Request
from fastapi.responses import HTMLResponse, Response
from sqlalchemy.orm import Session

from server.accounts import people, throttle
from server.accounts.deps import PageAdmin
from server.accounts.models import Role, ThrottleKind
from server.db import RowId, SessionDep, utcnow
from server.errors import DomainError, Invalid
from server.htmx import redirect, render

router = APIRouter(include_in_schema=False)
PAGE = "/admin/people"
DONE = {  # ?done=CODE&who=... -> what the page says was done (never text from the link itself)
    "role": "{who}'s role changed",
    "password": "new password for {who}; their browser sign-ins ended",
    "disabled": "{who} is disabled; their tokens and sign-ins ended",
    "enabled": "{who} may sign in again (old tokens stay revoked)",
    "revoked": "token {who} revoked",
    "cleared": "failed sign-ins of {who} cleared",
}


def _page(
    request: Request,
    session: Session,
    *,
    done: str | None = None,
    error: str | None = None,
    status_code: int = 200,
    show_ended: bool = False,
) -> HTMLResponse:
    now = utcnow()
    return render(
        request,
        "accounts/people.html",
        block="people",
        status_code=status_code,
        people=people.list_people(session),
        tokens=people.list_tokens(session, include_ended=show_ended),
        locks=throttle.list_locks(session, now),
        state_of=lambda t: people.token_state(t, now),
        now=now,
        roles=list(Role),
        done=done,
        error=error,
        show_ended=show_ended,
    )


@router.get(PAGE)
def people_page(
    request: Request,
    session: SessionDep,
    admin: PageAdmin,
    done: str = "",
    who: Annotated[str, Query(max_length=128)] = "",
    ended: bool = False,
) -> HTMLResponse:
    said = DONE[done].format(who=who) if done in DONE else None
    return _page(request, session, done=said, show_ended=ended)


def _change(
    request: Request, session: Session, done: str, who: str, act: Callable[[], object]
) -> Response:
    """Run ``act`` (one change), commit, 303 back saying it was ``done`` to ``who``."""
    try:
        act()
    except DomainError as exc:
        session.rollback()
        return _page(request, session, error=exc.message, status_code=exc.status_code)
    session.commit()
    return redirect(request, f"{PAGE}?{urlencode({'done': done, 'who': who})}")


@router.post(f"{PAGE}/{{name}}/role")
def change_role(
    request: Request,
    session: SessionDep,
    admin: PageAdmin,
    name: str,
    role: Annotated[Role, Form()],
) -> Response:
    return _change(
        request, session, "role", name,
        lambda: people.set_role(session, admin.name, name, role),
    )  # fmt: skip


@router.post(f"{PAGE}/{{name}}/password")
def change_password(
    request: Request,
    session: SessionDep,
    admin: PageAdmin,
    name: str,
    password: Annotated[str, Form()],
    again: Annotated[str, Form()],
) -> Response:
    def act() -> None:
        if password != again:
            raise Invalid("the two passwords differ; nothing was changed", field="password")
        keep = getattr(request.state, "token_id", None) if name == admin.name else None
        people.set_password(session, admin.name, name, password, keep_token=keep)

    return _change(request, session, "password", name, act)


@router.post(f"{PAGE}/{{name}}/disable")
def disable_user(request: Request, session: SessionDep, admin: PageAdmin, name: str) -> Response:
    return _change(
        request, session, "disabled", name,
        lambda: people.disable(session, admin.name, name),
    )  # fmt: skip


@router.post(f"{PAGE}/{{name}}/enable")
def enable_user(request: Request, session: SessionDep, admin: PageAdmin, name: str) -> Response:
    return _change(
        request, session, "enabled", name,
        lambda: people.enable(session, admin.name, name),
    )  # fmt: skip


@router.post("/admin/tokens/{token_id}/revoke")
def revoke_token(
    request: Request, session: SessionDep, admin: PageAdmin, token_id: RowId
) -> Response:
    return _change(
        request, session, "revoked", str(token_id),
        lambda: people.revoke(session, admin.name, token_id),
    )  # fmt: skip


@router.post("/admin/signin-locks/clear")
def clear_lock(
    request: Request,
    session: SessionDep,
    admin: PageAdmin,
    kind: Annotated[ThrottleKind, Form()],
    key: Annotated[str, Form(max_length=throttle.KEY_MAX)],
) -> Response:
    return _change(
        request, session, "cleared", f"{kind.value} {key}",
        lambda: people.unlock(session, admin.name, kind, key),
    )  # fmt: skip
