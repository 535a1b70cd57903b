"""Domain errors and the one place where they (and invalid requests) become responses."""

from __future__ import annotations

import logging
from urllib.parse import quote

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from pydantic import BaseModel
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

log = logging.getLogger("sensorledger")
BUSY_RETRY_AFTER_S = 2


class FieldProblem(BaseModel):
    field: str
    message: str


class Problem(BaseModel):
    """Every error of the API: what is wrong, the input at fault if one is, and for an invalid
    request every field's problem."""

    detail: str
    field: str | None = None
    errors: list[FieldProblem] | None = None


# Declared on every API operation (instead of FastAPI's own 422 shape, which we never send)
PROBLEMS: dict[int | str, dict[str, object]] = {
    401: {"model": Problem, "description": "No usable token (missing, unknown, expired, revoked)"},
    403: {"model": Problem, "description": "The token's user lacks the role"},
    422: {"model": Problem, "description": "A field or the request cannot be accepted"},
}


class DomainError(Exception):
    """An error the user can act on; ``field`` names the input at fault, when there is one."""

    status_code = 400

    def __init__(self, message: str, *, field: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.field = field


class NotFound(DomainError):
    status_code = 404


class Conflict(DomainError):
    status_code = 409


class Invalid(DomainError):
    status_code = 422


class NotSignedIn(DomainError):
    status_code = 401


class Forbidden(DomainError):
    status_code = 403


class TooManyTries(DomainError):
    """429: wait ``retry_after`` seconds (sent as Retry-After) before trying again."""

    status_code = 429

    def __init__(self, message: str, *, retry_after: int, field: str | None = None) -> None:
        super().__init__(message, field=field)
        self.retry_after = retry_after


def _is_api(request: Request) -> bool:
    return request.url.path.startswith("/api/")


def _field(loc: tuple[object, ...]) -> str:
    parts = [str(p) for p in loc]
    if parts and parts[0] in {"body", "query", "path", "form"}:
        parts = parts[1:]
    return ".".join(parts)


def install(app: FastAPI) -> None:
    """Register the handlers: JSON under /api/, an HTML page elsewhere."""
    from server.htmx import page_path, redirect, render  # local: htmx imports the templates

    @app.exception_handler(DomainError)
    async def on_domain_error(request: Request, exc: DomainError) -> Response:
        if isinstance(exc, NotSignedIn) and not _is_api(request):
            return redirect(request, f"/signin?next={quote(page_path(request), safe='/')}")
        headers = {"WWW-Authenticate": "Bearer"} if exc.status_code == 401 else {}
        if isinstance(exc, TooManyTries):
            headers["Retry-After"] = str(exc.retry_after)
        if _is_api(request):
            return JSONResponse(
                {"detail": exc.message, "field": exc.field}, exc.status_code, headers=headers
            )
        return render(
            request,
            "errors/page.html",
            block="problem",
            status_code=exc.status_code,
            headers=headers,
            message=exc.message,
        )

    @app.exception_handler(RequestValidationError)
    async def on_invalid(request: Request, exc: RequestValidationError) -> Response:
        errors = exc.errors()
        first = errors[0] if errors else {"loc": (), "msg": "invalid request"}
        field = _field(tuple(first.get("loc", ())))
        message = f"{field}: {first['msg']}" if field else str(first["msg"])
        if _is_api(request):
            detail = [
                {"field": _field(tuple(e.get("loc", ()))), "message": e["msg"]} for e in errors
            ]
            return JSONResponse({"detail": message, "field": field, "errors": detail}, 422)
        return render(
            request, "errors/page.html", block="problem", status_code=422, message=message
        )

    @app.exception_handler(OperationalError)
    async def on_busy(request: Request, exc: OperationalError) -> Response:
        """SQLite's write lock not had within the busy timeout (the one database error a
        request may meet under load and that a retry fixes): 503 with Retry-After, nothing
        stored. Any other database error is a bug: re-raised, a 500 with a log line."""
        if "database is locked" not in str(exc.orig):
            raise exc
        log.warning("write lock not had in time: %s %s", request.method, request.url.path)
        message = "the database is busy with other writers; nothing was stored, try again"
        headers = {"Retry-After": str(BUSY_RETRY_AFTER_S)}
        if _is_api(request):
            return JSONResponse({"detail": message, "field": None}, 503, headers=headers)
        response = render(
            request, "errors/page.html", block="problem", status_code=503, message=message
        )
        response.headers.update(headers)
        return response

    @app.exception_handler(StarletteHTTPException)
    async def on_http(request: Request, exc: StarletteHTTPException) -> Response:
        message = "not found" if exc.status_code == 404 else str(exc.detail)
        if _is_api(request):
            return JSONResponse({"detail": message, "field": None}, exc.status_code)
        return render(
            request,
            "errors/page.html",
            block="problem",
            status_code=exc.status_code,
            message=message,
        )
