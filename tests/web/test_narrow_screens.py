"""Every page at a phone's 390 px and a tablet's 768 px: the document is never wider than the
viewport (tables reflow or scroll inside their own box, plots resize, the nav wraps).

The pages are the app's GET routes that answer HTML (APIs, static files and downloads left
out), so a page added later is walked too; a path parameter this test cannot fill fails it.
The lists a technician reads (fleet, types, a unit's constants, history and budget, the flag
counts) must also lie wholly inside the screen, not in a box scrolled sideways. Screenshots
land in tests/artifacts/narrow-<width>-<page>.png."""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import select

from server.accounts import service as accounts
from server.accounts.models import Role, User
from server.app import create_app
from server.calibrations.models import CalibrationSession
from server.config import Settings
from server.db import make_engine, make_sessionmaker
from server.flags.models import Flag
from server.fleet.models import Unit
from server.standards import service as standards
from server.standards.models import ReferenceStandard
from server.standards.schemas import StandardCreate
from tests.web.seed import IR_TYPE, Fleet

pytestmark = pytest.mark.browser
WIDTHS = (390, 768)
ADMIN = ("wanda", "walk-every-page-1")  # an admin sees every page
STD = "NS angle jig"  # a reference standard, for the pages of one
SKIP_PREFIXES = ("/api/", "/static", "/docs", "/redoc", "/openapi")
# downloads and htmx-only answers: not pages a person reads at a width
NOT_PAGES = re.compile(r"\.(csv|json|h)$|/jobs/\{job_id\}$|^/find$")


def page_paths(url: str, fleet: Fleet) -> list[str]:
    """Every GET page route of the app with its parameters filled from the seeded fleet."""
    app = create_app(Settings(database_url=url))
    engine = make_engine(url)
    try:
        with make_sessionmaker(engine)() as session:
            unit = session.scalar(select(Unit).where(Unit.serial == fleet.calibrated))
            assert unit is not None
            session_id = session.scalar(
                select(CalibrationSession.id).where(CalibrationSession.unit_id == unit.id)
            )
            flag_id = session.scalar(select(Flag.id).where(Flag.open.is_(True)))
            if session.scalar(select(User).where(User.name == ADMIN[0])) is None:
                accounts.create_user(session, ADMIN[0], Role.admin, password=ADMIN[1])
                session.commit()
            known = select(ReferenceStandard).where(ReferenceStandard.name == STD)
            if session.scalar(known) is None:
                today = datetime.now(UTC).date()
                standards.create_standard(
                    session,
                    StandardCreate(
                        name=STD,
                        description="invented angle jig for the narrow-screen test",
                        quantity="angle",
                        value_unit="deg",
                        expanded_u=0.1,
                        k=2,
                        certificate="NS-1",
                        calibrated_on=today - timedelta(days=100),
                        due_on=today + timedelta(days=265),
                    ),
                    ADMIN[0],
                )
                session.commit()
    finally:
        engine.dispose()
        app.state.engine.dispose()
    values = {
        "serial": fleet.calibrated,
        "name": IR_TYPE,
        "session_id": str(session_id),
        "flag_id": str(flag_id),
    }
    paths = []
    for route in _routes(app.routes):
        path = getattr(route, "path", "")
        methods = getattr(route, "methods", None) or set()
        if "GET" not in methods or path.startswith(SKIP_PREFIXES) or NOT_PAGES.search(path):
            continue
        params = re.findall(r"\{(\w+)(?::\w+)?\}", path)
        missing = [p for p in params if p not in values]
        assert not missing, f"{path}: no value for {missing}; add one to this test"
        given = {**values, "name": STD} if path.startswith("/standards/") else values
        for p in params:
            path = re.sub(r"\{" + p + r"(?::\w+)?\}", given[p], path)
        paths.append(path)
    # the same pages in their other states a user meets
    paths += [f"/calibrate?unit={fleet.fresh}", "/types/new", "/attention?show=all"]
    return sorted(set(paths))


# elements reaching past the right edge that no scroll box clips (to say what to fix); an
# absolutely placed element escapes a scroll box that is not its containing block
OFFENDERS = """(width) => {
  const out = [];
  for (const el of document.querySelectorAll("body *")) {
    const r = el.getBoundingClientRect();
    if (r.right <= width + 1) continue;
    let clipped = false;
    for (let e = el.parentElement; e && e !== document.body; e = e.parentElement) {
      if (getComputedStyle(e).overflowX !== "visible") { clipped = true; break; }
    }
    const absolute = getComputedStyle(el).position !== "static";
    if (!clipped || absolute) {
      const name = el.tagName.toLowerCase() + "." + [...el.classList].join(".");
      out.push(name + " " + Math.round(r.right));
    }
  }
  return out.slice(0, 8);
}"""


# what a technician reads on a phone must lie inside the screen, not merely inside a box that
# scrolls sideways: the constants, the unit lists, the history, the types and the flag counts
WHOLLY_SHOWN = {
    "/": "table.units tbody td",
    "/types": "table.types tbody td",
    "/attention": "table.flag-counts td, table.flag-counts th",
    "/units/{serial}": ".constants table td, table.history td, table.budget td",
}
BEYOND = """([selector, width]) => [...document.querySelectorAll(selector)]
  .filter((el) => el.getClientRects().length && el.getBoundingClientRect().right > width + 1)
  .map((el) => (el.getAttribute("data-label") || el.tagName) + ": " + el.textContent.trim())
  .slice(0, 5)"""


def _routes(routes: list[Any], prefix: str = "") -> list[Any]:
    """Routes, with those of included routers (``original_router``) flattened."""
    found = []
    for route in routes:
        inner = getattr(route, "original_router", None)
        if inner is not None:
            found += _routes(inner.routes, prefix + getattr(route, "prefix", ""))
        else:
            found.append(route)
    return found


@pytest.mark.parametrize("width", WIDTHS)
def test_every_page_fits_the_screen(
    browser: Any, server: str, live_db: tuple[str, Fleet], artifacts: Path, width: int
) -> None:
    from tests.web.conftest import new_context, open_page, sign_in

    url, fleet = live_db
    context, guard = new_context(browser, server)
    context.close()
    context = browser.new_context(base_url=server, viewport={"width": width, "height": 844})
    context.set_default_timeout(10_000)
    context.route("**/*", guard.route)
    page = open_page(context, guard)
    too_wide: dict[str, int] = {}
    offenders: dict[str, list[str]] = {}
    checked: set[str] = set()
    try:
        page.goto("/signin")
        shown = page.evaluate("document.documentElement.scrollWidth")
        page.screenshot(path=artifacts / f"narrow-{width}-signin.png", full_page=True)
        if shown > width:
            too_wide["/signin"] = shown
        paths = page_paths(url, fleet)
        sign_in(page, *ADMIN)
        page.wait_for_url(f"{server}/")
        assert "/units/" + fleet.calibrated in paths and "/attention" in paths
        for path in paths:
            answer = page.goto(path)
            assert answer is not None and answer.status == 200, path
            page.wait_for_load_state("networkidle")
            shown = page.evaluate("document.documentElement.scrollWidth")
            name = re.sub(r"[^A-Za-z0-9]+", "-", path).strip("-") or "fleet"
            page.screenshot(path=artifacts / f"narrow-{width}-{name}.png", full_page=True)
            if shown > width:
                too_wide[path] = shown
                offenders[path] = page.evaluate(OFFENDERS, width)
            selector = WHOLLY_SHOWN.get(path.replace(fleet.calibrated, "{serial}"))
            if selector:
                checked.add(path)
                cut = page.evaluate(BEYOND, [selector, width])
                if cut:
                    offenders[path] = cut
                    too_wide[path] = max(shown, width + 1)
        guard.check()
    finally:
        context.close()
    assert len(checked) == len(WHOLLY_SHOWN)
    assert not too_wide, f"wider than {width} px (scrollWidth): {too_wide}; widest: {offenders}"
