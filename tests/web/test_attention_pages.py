"""Needs attention at scale, without a browser: counts first, pages of flags grouped by kind (open
actions, then warnings), filters, pager links that work without JavaScript, and each flag's plot
served on its own (htmx block or page), never built into the list."""

from __future__ import annotations

import json
import re
from collections import Counter
from datetime import UTC, datetime
from html import unescape
from pathlib import Path

import pytest
from sqlalchemy import select

from server.app import create_app
from server.config import Settings
from server.flags.models import Flag, FlagKind, Severity
from server.flags.service import recompute_all
from server.fleet.models import Unit
from tests.web.seed import seed

HTMX = {"HX-Request": "true"}
CARD = re.compile(r'<article class="flag-card severity-(\w+)[^"]*" id="flag-(\d+)"')
GROUP = re.compile(r'<section class="flag-group" id="(\w+)-(\w+)" data-kind="(\w+)"')


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The seeded fleet's real flags (a drift, a failed acceptance, an overdue, all actions) and
    copies of them, so that there are several pages: 24 drift and 20 overdue copies as warnings,
    10 failed-acceptance copies as actions; one more drift copy closed."""
    path = tmp_path_factory.mktemp("attention") / "sensorledger.db"
    url = f"sqlite:///{path}"
    seed(url)
    app = create_app(Settings(database_url=url))
    with app.state.sessionmaker() as session:
        recompute_all(session)
        session.flush()
        real = {f.kind: f for f in session.scalars(select(Flag))}
        # on units the app's start leaves alone (its overdue sweep recomputes late units)
        today = datetime.now(UTC).date()
        units = [
            u
            for u in session.scalars(select(Unit).order_by(Unit.id))
            if u.due_on is None or u.due_on >= today
        ]
        plan = [
            (FlagKind.drift, Severity.warning, 24, True),
            (FlagKind.overdue, Severity.warning, 20, True),
            (FlagKind.failed_acceptance, Severity.action, 10, True),
            (FlagKind.drift, Severity.action, 1, False),
        ]
        for kind, severity, n, is_open in plan:
            model = real[kind]
            for i in range(n):
                session.add(
                    Flag(
                        unit=units[i % len(units)],
                        kind=kind,
                        severity=severity,
                        key=f"copy:{kind.value}:{severity.value}:{i}:{is_open}",
                        message=model.message,
                        evidence=model.evidence,
                        open=is_open,
                    )
                )
        session.commit()
    app.state.engine.dispose()
    return path


def cards(html: str) -> list[tuple[str, int]]:
    return [(severity, int(i)) for severity, i in CARD.findall(html)]


def test_counts_first_then_a_page_of_flags_actions_first_grouped_by_kind(client) -> None:
    html = client.get("/attention?per_page=20").text
    assert html.index('id="attention-counts"') < html.index('id="flag-list"')
    counts = re.search(r'id="attention-counts".*?</section>', html, re.S).group(0)
    rows = {
        kind: [int(n) for n in re.findall(r'<td class="num">(?:<a[^>]*>)?(\d+)', row)]
        for kind, row in re.findall(r'flag-(\w+)">\w+</span>.*?</th>(.*?)</tr>', counts, re.S)
    }
    # action, warning, not acknowledged: the real flags plus the open copies
    assert rows["drift"] == [1, 24, 25]
    assert rows["failed_acceptance"] == [11, 0, 11]
    assert rows["overdue"] == [1, 20, 21]
    assert rows["fleet_outlier"] == [0, 0, 0]
    # the badge and the status line count open action flags nobody acknowledged (1 + 11 + 1);
    # the 44 warnings are named apart and counted under their own heading
    assert "<strong>13</strong> action flags waiting for an acknowledgement" in counts
    assert re.search(r'severity=warning[^"]*">44 warnings</a> to watch, not counted', counts)
    assert re.search(r'<span id="nav-count" class="nav-count">13</span>', html)

    shown = cards(html)
    assert len(shown) == 20
    assert "flags 1–20 of 57" in html
    assert [s for s, _ in shown] == ["action"] * 13 + ["warning"] * 7  # actions first
    groups = GROUP.findall(html)
    assert [(s, k) for s, k, _ in groups] == [
        ("action", "drift"),
        ("action", "failed_acceptance"),
        ("action", "overdue"),
        ("warning", "drift"),
    ]
    assert Counter(k for _, k, _ in groups)["drift"] == 2  # one group per section and kind
    # warnings collapsed (a closed <details>) under their heading with their count
    warnings = re.search(r'<details class="flag-section section-warning"[^>]*>', html).group(0)
    assert " open" not in warnings
    assert re.search(r"Warnings: signals to watch <span class=\"section-count\">44</span>", html)
    assert html.index('class="flag-section section-action"') < html.index("section-warning")
    assert "data-figure" not in html  # no plot is built before the first byte


def test_pager_links_work_without_javascript_and_cover_every_open_flag(client) -> None:
    seen: list[int] = []
    url: str | None = "/attention?per_page=20"
    pages = 0
    while url is not None:
        html = client.get(unescape(url)).text
        seen += [i for _, i in cards(html)]
        pages += 1
        following = re.search(r'<a href="([^"]+)" rel="next"', html)
        url = following.group(1) if following else None
    assert pages == 3
    assert len(seen) == len(set(seen)) == 57
    last = client.get("/attention?per_page=20&page=3").text
    assert "flags 41–57 of 57" in last and 'rel="prev"' in last
    assert '<span class="disabled">next →</span>' in last
    closed = client.get("/attention?show=all&per_page=100").text
    assert len(cards(closed)) == 58 and 'class="flag-section section-closed"' in closed


def test_htmx_pages_get_the_list_alone(client) -> None:
    block = client.get("/attention?per_page=20&page=2", headers=HTMX)
    assert block.status_code == 200
    assert block.text.lstrip().startswith('<div id="flag-list">')
    assert "<html" not in block.text and 'id="attention-counts"' not in block.text
    assert "flags 21–40 of 57" in block.text


def test_filters_by_kind_and_severity(client) -> None:
    html = client.get("/attention?kind=drift&severity=warning").text
    assert {(s, k) for s, k, _ in GROUP.findall(html)} == {("warning", "drift")}
    assert len(cards(html)) == 24 and "Show every kind" in html
    # filtered to warnings, the section is open and counts the kind's warnings
    assert re.search(r'<details class="flag-section section-warning"[^>]* open>', html)
    assert re.search(r'<span class="section-count">24</span>', html)
    assert 'href="/attention?kind=drift&amp;severity=warning"' in html  # from the counts table
    for bad in ("kind=nope", "severity=loud", "show=some"):
        assert client.get(f"/attention?{bad}").status_code == 422


def test_each_plot_is_a_placeholder_loaded_when_revealed_with_a_plain_link(client) -> None:
    html = client.get("/attention?kind=failed_acceptance").text
    ids = [i for _, i in cards(html)]
    for flag_id in ids:
        chart = f"/attention/flags/{flag_id}/chart"
        slot = re.search(
            rf'<div class="plot flag-plot flag-plot-slot" id="flag-plot-{flag_id}"'
            rf'\s+hx-get="{chart}" hx-trigger="revealed"',
            html,
        )
        assert slot is not None
        assert f'<a class="button quiet" href="{chart}"' in html
    overdue = client.get("/attention?kind=overdue").text
    assert "flag-plot-slot" not in overdue  # its evidence is a date: nothing to draw


def test_chart_route_serves_the_block_or_a_page(client) -> None:
    html = client.get("/attention?kind=failed_acceptance").text
    flag_id = cards(html)[0][1]
    url = f"/attention/flags/{flag_id}/chart"
    block = client.get(url, headers=HTMX)
    assert block.status_code == 200 and "<html" not in block.text
    assert block.text.lstrip().startswith(f'<div class="plot flag-plot" id="flag-plot-{flag_id}"')
    figure = json.loads(unescape(re.search(r'data-figure="([^"]+)"', block.text).group(1)))
    assert figure["data"] and figure["layout"]
    page = client.get(url)
    assert page.status_code == 200 and "<html" in page.text and "data-figure" in page.text
    assert f'href="/attention#flag-{flag_id}"' in page.text
    assert client.get("/attention/flags/999999/chart", headers=HTMX).status_code == 404
    assert client.get("/attention/flags/999999/chart").status_code == 404


def test_chart_route_needs_a_sign_in(app) -> None:
    from fastapi.testclient import TestClient

    with TestClient(app) as anonymous:
        answer = anonymous.get("/attention/flags/1/chart", follow_redirects=False)
        assert answer.status_code == 303
        assert answer.headers["location"] == "/signin?next=/attention/flags/1/chart"
        assert "data-figure" not in answer.text
        htmx = anonymous.get("/attention/flags/1/chart", headers=HTMX)
        assert htmx.headers.get("HX-Redirect", "").startswith("/signin")


def test_acknowledging_without_javascript_returns_to_the_same_page(client) -> None:
    html = client.get("/attention?per_page=20&page=2").text
    flag_id = cards(html)[0][1]
    back = re.search(rf'id="flag-{flag_id}".*?name="back" value="([^"]+)"', html, re.S).group(1)
    assert unescape(back) == "/attention?page=2&per_page=20"
    done = client.post(
        f"/attention/flags/{flag_id}/acknowledge",
        data={"note": "checked on the rig", "back": unescape(back)},
        follow_redirects=False,
    )
    assert done.status_code == 303
    assert done.headers["location"] == f"/attention?page=2&per_page=20#flag-{flag_id}"
    elsewhere = client.post(
        f"/attention/flags/{cards(html)[1][1]}/acknowledge",
        data={"note": "seen", "back": "https://elsewhere.example/"},
        follow_redirects=False,
    )
    assert elsewhere.headers["location"].startswith("/attention#flag-")
    empty = client.post(
        f"/attention/flags/{cards(html)[2][1]}/acknowledge",
        data={"note": " ", "back": "/attention?page=2&per_page=20"},
    )
    assert empty.status_code == 422 and "a note is needed" in empty.text
    assert "flags 21–40 of 57" in empty.text  # the same page, with the card to fix
