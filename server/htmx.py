"""The only reader of HX-* headers: render a whole page, or one named block for htmx."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from fastapi import Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from jinja2 import Environment, FileSystemLoader, StrictUndefined, select_autoescape

from server.accounts.csrf import csrf_input, csrf_token
from server.formatting import FILTERS

WEB = Path(__file__).resolve().parent.parent / "web"

env = Environment(
    loader=FileSystemLoader(WEB / "templates"),
    autoescape=select_autoescape(["html"]),
    undefined=StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)
env.filters["tojson_compact"] = lambda v: json.dumps(v, separators=(",", ":"))
env.filters.update(FILTERS)
# every POST form carries {{ csrf_input() }}; base.html gives htmx the token
env.globals.update(csrf_input=csrf_input, csrf_token=csrf_token)


def is_partial(request: Request) -> bool:
    h = request.headers
    return h.get("HX-Request") == "true" and h.get("HX-History-Restore-Request") != "true"


def redirect(request: Request, url: str) -> Response:
    """Go to ``url``: a 303 for a plain request; for htmx an ``HX-Redirect``, so that the whole
    page changes instead of the new page landing inside the element that asked."""
    if is_partial(request):
        return Response(status_code=200, headers={"HX-Redirect": url, "Vary": "HX-Request"})
    return RedirectResponse(url, status_code=303)


def page_path(request: Request) -> str:
    """The path of the page the user is on: for htmx the page that sent the request (its
    ``HX-Current-URL``), else the request's own path."""
    current = request.headers.get("HX-Current-URL") if is_partial(request) else None
    if current:
        parsed = urlsplit(current)
        return parsed.path + (f"?{parsed.query}" if parsed.query else "")
    return request.url.path


def render(
    request: Request,
    name: str,
    /,
    *,
    block: str,
    status_code: int = 200,
    headers: dict[str, str] | None = None,
    **ctx: Any,
) -> HTMLResponse:
    """The page ``name``, or only its ``block`` when htmx asked for a fragment."""
    template = env.get_template(name)
    ctx.setdefault("user", getattr(request.state, "user", None))
    ctx.setdefault("attention_count", getattr(request.state, "attention_count", None))
    ctx["request"] = request
    ctx.setdefault("partial", is_partial(request))  # templates ask this, never the headers
    ctx.setdefault("status_code", status_code)
    if is_partial(request):
        html = "".join(template.blocks[block](template.new_context(ctx)))
    else:
        html = template.render(ctx)
    return HTMLResponse(html, status_code, headers={"Vary": "HX-Request", **(headers or {})})
