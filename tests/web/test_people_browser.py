"""/admin/people in Chromium: an admin disables and enables someone with the buttons (plain
forms with the CSRF token) and the page says so."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest

from server.accounts import service as accounts
from server.accounts.models import Role
from server.db import make_engine, make_sessionmaker
from tests.web.conftest import new_context, open_page, sign_in
from tests.web.seed import Fleet

pytestmark = pytest.mark.browser


def test_an_admin_disables_and_enables_someone(
    browser: Any, server: str, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    engine = make_engine(live_db[0])
    with make_sessionmaker(engine)() as session:
        accounts.create_user(session, "root-admin", Role.admin, password="root-pw-1")
        accounts.create_user(session, "pat", Role.viewer, password="pat-pw-1")
        session.commit()
    engine.dispose()
    context, guard = new_context(browser, server)
    page = open_page(context, guard)
    page.goto("/signin")
    sign_in(page, "root-admin", "root-pw-1")
    page.wait_for_url(f"{server}/")
    page.click("nav >> text=People")
    page.wait_for_url(re.compile(r"/admin/people$"))
    page.screenshot(path=artifacts / "people.png", full_page=True)

    page.click("#user-pat form[action$='/disable'] button")
    page.wait_for_selector("p.notice >> text=Pat is disabled")
    assert "disabled" in page.locator("#user-pat").inner_text()
    page.click("#user-pat form[action$='/enable'] button")
    page.wait_for_selector("p.notice >> text=Pat may sign in again")
    page.select_option("#user-pat select[name=role]", "technician")
    page.click("#user-pat form[action$='/role'] button")
    page.wait_for_selector("p.notice >> text=Pat's role changed")
    assert page.locator("#user-pat select[name=role]").input_value() == "technician"
    context.close()
    guard.check()
