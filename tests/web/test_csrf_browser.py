"""CSRF in real Chromium: the forms still work (plain posts and htmx posts carry the token), and a
page from before signing in again is refused with its form given back, which then sends."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest

from tests.web.conftest import new_context, open_page, sign_in
from tests.web.seed import TECHNICIAN, Fleet

pytestmark = pytest.mark.browser


def status_of(page: Any) -> str:
    return page.locator(".status").first.inner_text().strip()


def test_forms_work_and_a_stale_page_gets_its_form_back(
    browser: Any, server: str, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    serial = live_db[1].pot
    context, guard = new_context(browser, server)
    page = open_page(context, guard)
    page.goto("/signin")
    sign_in(page, *TECHNICIAN)
    page.wait_for_url(f"{server}/")

    # a plain form: the status moves
    page.goto(f"/units/{serial}")
    page.click("form.status-moves button[value=quarantined]")
    page.wait_for_selector(".status-quarantined")
    page.click("form.status-moves button[value=in_stock]")
    page.wait_for_selector(".status-in_stock")

    # an htmx form: the installation event, swapped in place (the header from <body>)
    def record_event(kind: str) -> int:
        page.select_option("#event-kind", kind)
        with page.expect_response(
            lambda r: r.url.endswith("/events") and r.request.method == "POST"
        ) as answer:
            page.click("form.event-form button[type=submit]")
        assert answer.value.request.headers.get("x-csrf-token")  # htmx sent the token
        status = int(answer.value.status)
        # the answer is HX-Redirect to this same page plus #installations, which the browser
        # takes as a jump to the anchor, not a reload: load the page to see the event
        page.goto(f"/units/{serial}")
        page.wait_for_load_state("load")
        return status

    page.wait_for_load_state("load")  # htmx (deferred) has processed the page
    page.fill("#event-location", "csrf bench / left")
    assert record_event("installed") == 200
    assert "csrf bench / left" in page.locator("#installations table").inner_text()
    assert record_event("removed") == 200
    assert "removed" in page.locator("#installations table").inner_text()
    assert page.locator("#request-problem").is_hidden()

    # the page stays open while the user signs out and in again in another tab
    other = open_page(context, guard)
    other.goto("/")
    other.click("form[action='/signout'] button")
    other.wait_for_url(re.compile(r"/signin"))
    sign_in(other, *TECHNICIAN)
    other.wait_for_url(f"{server}/")
    other.close()

    page.click("form.status-moves button[value=quarantined]")
    page.wait_for_selector("#refused-form")
    page.screenshot(path=artifacts / "csrf-refused.png", full_page=True)
    assert "security token" in page.locator(".problem-message").inner_text()
    assert page.input_value("#refused-form input[name=status]") == "quarantined"
    page.click("#refused-form button[type=submit]")
    page.wait_for_url(re.compile(rf"/units/{serial}"))
    page.wait_for_selector(".status-quarantined")
    page.click("form.status-moves button[value=in_stock]")
    page.wait_for_selector(".status-in_stock")

    page.click("form[action='/signout'] button")
    page.wait_for_url(re.compile(r"/signin"))
    context.close()
    guard.check()
