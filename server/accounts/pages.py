"""Sign in and out of the browser front end."""

from __future__ import annotations

from typing import Annotated
from urllib.parse import urlsplit

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.accounts import service
from server.accounts.csrf import COOKIE
from server.db import SessionDep
from server.errors import NotSignedIn, TooManyTries
from server.htmx import render

router = APIRouter(include_in_schema=False)


def _safe_next(target: str | None) -> str:
    """Only local paths: a sign-in never redirects off this site."""
    if (
        not target
        or not target.startswith("/")
        or target.startswith("//")
        or urlsplit(target).netloc
    ):
        return "/"
    return target


@router.get("/signin")
def signin_page(request: Request, next: str = "/") -> HTMLResponse:
    return render(
        request,
        "accounts/signin.html",
        block="form",
        user=None,
        next=_safe_next(next),
        error=None,
        username="",  # not "name": render() takes the template's name as its parameter `name`
    )


@router.post("/signin")
def signin(
    request: Request,
    session: SessionDep,
    name: Annotated[str, Form()],
    password: Annotated[str, Form()],
    next: Annotated[str, Form()] = "/",
) -> Response:
    address = request.client.host if request.client else "unknown"
    try:
        raw = service.sign_in(
            session, name, password, request.app.state.settings.session_days, address
        )
    except (NotSignedIn, TooManyTries) as exc:
        session.commit()  # the failure counts (server.accounts.throttle)
        headers = {"Retry-After": str(exc.retry_after)} if isinstance(exc, TooManyTries) else None
        return render(
            request,
            "accounts/signin.html",
            block="form",
            status_code=exc.status_code,
            headers=headers,
            user=None,
            next=_safe_next(next),
            error=exc.message,
            username=name,
        )
    session.commit()
    response = RedirectResponse(_safe_next(next), status_code=303)
    response.set_cookie(
        COOKIE,
        raw,
        httponly=True,
        samesite="lax",
        max_age=request.app.state.settings.session_days * 86400,
    )
    return response


@router.post("/signout")
def signout(request: Request, session: SessionDep) -> Response:
    raw = request.cookies.get(COOKIE)
    if raw:
        service.revoke_token(session, raw)
        session.commit()
    response = RedirectResponse("/signin", status_code=303)
    response.delete_cookie(COOKIE)
    return response
