"""The API reference at /docs: Swagger UI from web/static/vendor/, so it works with no internet."""

from __future__ import annotations

from fastapi import FastAPI
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import HTMLResponse

SWAGGER_UI = "/static/vendor/swagger-ui-5.35.0"  # see web/static/vendor/README.md


def install(app: FastAPI) -> None:
    """Serve /docs from the vendored Swagger UI (the app is made with ``docs_url=None`` and
    ``redoc_url=None``: FastAPI's own pages load their files from a CDN)."""

    @app.get("/docs", include_in_schema=False)
    def docs() -> HTMLResponse:
        return get_swagger_ui_html(
            openapi_url=app.openapi_url or "/openapi.json",
            title=f"{app.title} API",
            swagger_js_url=f"{SWAGGER_UI}/swagger-ui-bundle.js",
            swagger_css_url=f"{SWAGGER_UI}/swagger-ui.css",
            swagger_favicon_url="/static/favicon.svg",
            # no badge from the public validator service
            swagger_ui_parameters={"validatorUrl": None, "persistAuthorization": False},
        )
