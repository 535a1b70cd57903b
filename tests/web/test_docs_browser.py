"""The API reference at /docs renders in Chromium with every request kept on 127.0.0.1 (Swagger UI
is vendored: a lab network without internet still has its API docs)."""

from __future__ import annotations

from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import pytest

pytestmark = pytest.mark.browser


def test_docs_render_offline(browser: Any, server: str, artifacts: Path) -> None:
    context = browser.new_context(base_url=server)
    context.set_default_timeout(15_000)
    seen: list[str] = []

    def record(route: Any) -> None:
        url = route.request.url
        seen.append(url)
        if urlsplit(url).hostname == "127.0.0.1":
            route.continue_()
        else:
            route.abort()

    context.route("**/*", record)
    page = context.new_page()
    errors: list[str] = []
    page.on("pageerror", lambda exc: errors.append(str(exc)))
    page.goto("/docs")
    # Swagger UI drew the title and the operations from /openapi.json
    page.wait_for_selector(".swagger-ui .info .title")
    assert "sensorledger" in page.locator(".swagger-ui .info .title").inner_text()
    page.wait_for_selector(".opblock-tag-section")
    assert page.locator(".opblock").count() >= 20
    page.screenshot(path=artifacts / "api-docs.png")
    context.close()

    hosts = {urlsplit(u).hostname for u in seen if not u.startswith(("data:", "blob:"))}
    assert hosts == {"127.0.0.1"}, seen
    paths = {urlsplit(u).path for u in seen}
    assert {"/docs", "/openapi.json", "/static/favicon.svg"} <= paths
    assert any(p.endswith("/swagger-ui-bundle.js") for p in paths)
    assert not errors, errors
