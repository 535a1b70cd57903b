"""Needs attention in Chromium: a flag's plot is fetched only when its card scrolls into view."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import delete, select

from server.db import make_engine, make_sessionmaker
from server.flags.models import Flag, FlagKind, Severity
from server.fleet.models import Unit
from tests.web.seed import Fleet

pytestmark = pytest.mark.browser
COPIES = 30
KEY = "browser-copy:"


def _copy_flags(url: str, serial: str) -> None:
    """COPIES warnings copied from an open failed-acceptance flag (the seeded failing unit's,
    raised when the server started), so that a page of them is many screens long."""
    engine = make_engine(url)
    try:
        with make_sessionmaker(engine)() as session:
            model = session.scalars(
                select(Flag).where(Flag.kind == FlagKind.failed_acceptance, Flag.open.is_(True))
            ).first()
            assert model is not None, "the seeded failing unit has no open failed flag"
            unit = session.scalar(select(Unit).where(Unit.serial == serial))
            for i in range(COPIES):
                session.add(
                    Flag(
                        unit=unit,
                        kind=model.kind,
                        severity=Severity.warning,
                        key=f"{KEY}{i}",
                        message=f"{model.message} (copy {i})",
                        evidence=model.evidence,
                    )
                )
            session.commit()
    finally:
        engine.dispose()


def _drop_copies(url: str) -> None:
    engine = make_engine(url)
    try:
        with make_sessionmaker(engine)() as session:
            session.execute(delete(Flag).where(Flag.key.startswith(KEY)))
            session.commit()
    finally:
        engine.dispose()


def test_a_plot_loads_when_its_card_scrolls_into_view(
    page: Any, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    url, fleet = live_db
    _copy_flags(url, fleet.failing)
    try:
        asked: list[str] = []
        page.on("request", lambda r: asked.append(r.url) if r.url.endswith("/chart") else None)
        page.goto(f"/attention?kind=failed_acceptance&severity=warning&per_page={COPIES}")
        cards = page.locator(".flag-card")
        assert cards.count() == COPIES
        first, last = cards.first, cards.last
        first.scroll_into_view_if_needed()  # below the counts table
        first.locator(".flag-plot.js-plotly-plot .main-svg").first.wait_for()
        page.wait_for_timeout(500)  # time enough for any other request htmx would make
        last_id = re.sub(r"\D", "", last.get_attribute("id") or "")
        chart_url = f"/attention/flags/{last_id}/chart"
        assert not any(u.endswith(chart_url) for u in asked), "fetched before it was seen"
        assert last.locator(".flag-plot-slot").count() == 1
        assert last.locator(".js-plotly-plot").count() == 0
        assert len(asked) < COPIES  # only the cards seen so far

        last.scroll_into_view_if_needed()
        last.locator(".flag-plot.js-plotly-plot .main-svg").first.wait_for()
        assert any(u.endswith(chart_url) for u in asked)
        assert last.locator(".flag-plot-slot").count() == 0  # the placeholder was replaced
        assert last.locator(".flag-plot .scatterlayer .trace").count() >= 1
        page.screenshot(path=artifacts / "attention-scrolled.png", full_page=False)
    finally:
        _drop_copies(url)


def test_warnings_are_collapsed_out_of_the_badge_and_open_with_their_plots(
    page: Any, live_db: tuple[str, Fleet], artifacts: Path
) -> None:
    url, fleet = live_db
    page.goto("/attention")
    badge_before = page.locator("#nav-count").inner_text()
    _copy_flags(url, fleet.failing)
    try:
        page.goto(f"/attention?per_page={COPIES + 20}")
        assert page.locator("#nav-count").inner_text() == badge_before  # warnings not counted
        warnings = page.locator("details.flag-section.section-warning")
        summary = warnings.locator("summary")
        assert re.search(rf"Warnings: signals to watch\s+{COPIES}\b", summary.inner_text())
        assert warnings.get_attribute("open") is None
        first = warnings.locator(".flag-card").first
        assert not first.is_visible()  # collapsed: listed, not shown
        actions = page.locator("section.flag-section.section-action .flag-card")
        assert actions.count() >= 1 and actions.first.is_visible()
        page.screenshot(path=artifacts / "attention-warnings-collapsed.png", full_page=True)
        summary.click()
        assert first.is_visible()
        first.scroll_into_view_if_needed()
        first.locator(".flag-plot.js-plotly-plot .main-svg").first.wait_for()
        page.screenshot(path=artifacts / "attention-warnings-open.png", full_page=False)
    finally:
        _drop_copies(url)
