"""Cross-site request forgery: a state-changing browser request must come from this site's own
pages and carry the sign-in's token.

Every request other than GET/HEAD/OPTIONS outside ``/api/`` is checked (``check``, a dependency of
the whole app, so a new route is covered without doing anything):

- its ``Origin`` (else its ``Referer``), when sent, names this server (same host and port);
- when the browser holds a sign-in cookie, the request carries ``token_of(cookie)``: in the
  ``X-CSRF-Token`` header (htmx sends it for every request: ``hx-headers`` on ``<body>``) or in the
  form field ``csrf_token`` (``{{ csrf_input() }}`` inside every ``<form method="post">``).

The token is an HMAC of the sign-in cookie, so it is per session, needs no storage and is the
same in every server process; a page from before the user signed in again carries a stale one.
A refused request changes nothing and gets a 403 page that gives the form back filled in
(``errors/refused.html``). The API (bearer tokens, no cookies) is not concerned.
"""

from __future__ import annotations

import hashlib
import hmac
from urllib.parse import urlsplit

from fastapi import FastAPI, Request
from fastapi.responses import Response
from jinja2 import pass_context
from jinja2.runtime import Context
from markupsafe import Markup
from starlette.datastructures import MutableHeaders, UploadFile
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from server.errors import Forbidden

COOKIE = "sensorledger_signin"  # the browser sign-in cookie (its value is a browser token)
FIELD = "csrf_token"
HEADER = "X-CSRF-Token"
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})
FORM_TYPES = ("application/x-www-form-urlencoded", "multipart/form-data")


def token_of(cookie: str) -> str:
    """The token that requests signed in with ``cookie`` must carry."""
    return hmac.new(cookie.encode(), b"sensorledger csrf", hashlib.sha256).hexdigest()


def token_for(request: Request) -> str | None:
    """The token for the request's sign-in, or None when it has no sign-in cookie."""
    cookie = request.cookies.get(COOKIE)
    return token_of(cookie) if cookie else None


@pass_context
def csrf_token(ctx: Context) -> str:
    """Jinja: the page's token ("" when not signed in)."""
    return token_for(ctx["request"]) or ""


@pass_context
def csrf_input(ctx: Context) -> Markup:
    """Jinja: ``{{ csrf_input() }}`` inside a ``<form method="post">``."""
    token = token_for(ctx["request"])
    if not token:
        return Markup("")
    return Markup('<input type="hidden" name="{}" value="{}">').format(FIELD, token)


class Refused(Forbidden):
    """A state-changing request without the right token or from another site."""

    def __init__(
        self, message: str, *, fields: list[tuple[str, str]], files: list[str], foreign: bool
    ) -> None:
        super().__init__(message)
        self.fields = fields
        self.files = files
        self.foreign = foreign


def _host(netloc: str, scheme: str) -> str:
    """``netloc`` lower-cased without the scheme's default port."""
    netloc = netloc.lower()
    default = {"http": ":80", "https": ":443"}.get(scheme, "")
    return netloc[: -len(default)] if default and netloc.endswith(default) else netloc


def foreign_origin(request: Request) -> str | None:
    """The other site that sent the request, or None when it came from here (or said nothing:
    browsers send ``Origin`` with every POST, so only a non-browser client omits both)."""
    sent = request.headers.get("origin") or request.headers.get("referer")
    if not sent:
        return None
    if sent == "null":  # an opaque origin (a sandboxed frame, a file, a data: URL)
        return sent
    parts = urlsplit(sent)
    own = request.headers.get("host", "")
    if _host(parts.netloc, parts.scheme) != _host(own, request.url.scheme):
        return f"{parts.scheme}://{parts.netloc}"
    return None


async def check(request: Request) -> None:
    """Refuse a state-changing browser request from another site or without the token."""
    if request.method in SAFE_METHODS or request.url.path.startswith("/api/"):
        return
    foreign = foreign_origin(request)
    expected = token_for(request)
    if foreign is None and expected is None:
        return  # not signed in (the sign-in form itself), from this site
    sent = request.headers.get(HEADER)
    form = None
    if request.headers.get("content-type", "").startswith(FORM_TYPES):
        form = await request.form()  # cached: the route reads the same parsed form
        if sent is None:
            value = form.get(FIELD)
            sent = value if isinstance(value, str) else None
    if foreign is None and expected is not None and hmac.compare_digest(sent or "", expected):
        return
    fields: list[tuple[str, str]] = []
    files: list[str] = []
    for key, value in form.multi_items() if form is not None else ():
        if isinstance(value, UploadFile):
            files.append(key)
        elif key != FIELD:
            fields.append((key, value))
    if foreign is not None:
        message = (
            f"this request came from another site ({foreign}), not from a sensorledger page; "
            "nothing was changed"
        )
    else:
        message = (
            "this form was sent without this sign-in's security token (the page was probably "
            "opened before you signed in again); nothing was changed"
        )
    raise Refused(message, fields=fields, files=files, foreign=foreign is not None)


class NoFraming:
    """ASGI middleware: ``X-Frame-Options: DENY`` and ``frame-ancestors 'none'`` on every answer,
    so no other site shows a page of ours in a frame and steers clicks on it."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def sending(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = MutableHeaders(scope=message)
                headers["X-Frame-Options"] = "DENY"
                headers["Content-Security-Policy"] = "frame-ancestors 'none'"
            await send(message)

        await self.app(scope, receive, sending)


def install(app: FastAPI) -> None:
    """The 403 page of a refused request: the form given back filled in, to check and send
    again (never the password); htmx gets the same status and says so (static/js/app.js)."""
    from server.htmx import render  # local: htmx imports the templates

    app.add_middleware(NoFraming)

    @app.exception_handler(Refused)
    async def on_refused(request: Request, exc: Refused) -> Response:
        action = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        return render(
            request,
            "errors/refused.html",
            block="problem",
            status_code=403,
            headers={"X-Refused": "csrf"},
            message=exc.message,
            fields=exc.fields,
            files=exc.files,
            foreign=exc.foreign,
            action=action,
        )
