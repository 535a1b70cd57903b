"""Front-end fixtures: a seeded SQLite file, a real uvicorn server on it, and Debian's Chromium.

The browser suite (marked ``browser``) never downloads a browser: it drives /usr/bin/chromium, and
skips (fails with CI=true) when that is missing. Every request a page makes to another host is
blocked and fails the test: nothing may leave the machine.
"""

from __future__ import annotations

import shutil
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import pytest
from fastapi.testclient import TestClient

from server.accounts import csrf
from server.app import create_app
from server.config import Settings
from tests.conftest import missing
from tests.liveserver import answers, free_port, start_uvicorn
from tests.web.seed import TECHNICIAN, VIEWER, Fleet, seed

ROOT = Path(__file__).resolve().parents[2]
ARTIFACTS = ROOT / "tests" / "artifacts"
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-dev-shm-usage",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
VIEWPORT = {"width": 1366, "height": 768}  # a common bench laptop
STARTUP_SECONDS = 30


@pytest.fixture(scope="session")
def live_db(tmp_path_factory: pytest.TempPathFactory) -> tuple[str, Fleet]:
    """A seeded SQLite file shared by the browser tests; each test uses its own units."""
    url = f"sqlite:///{tmp_path_factory.mktemp('web') / 'sensorledger.db'}"
    return url, seed(url)


@pytest.fixture(scope="session")
def server(live_db: tuple[str, Fleet], tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """``uvicorn server.app:create_app`` in a subprocess on a free port; its base URL."""
    url, _ = live_db
    port = free_port()
    log_path = tmp_path_factory.mktemp("uvicorn") / "server.log"
    proc = start_uvicorn(url, port, log_path)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + STARTUP_SECONDS
        while not answers(f"{base}/signin"):
            if proc.poll() is not None or time.monotonic() > deadline:
                pytest.fail(f"uvicorn did not start (exit {proc.poll()}):\n{log_path.read_text()}")
            time.sleep(0.1)
        yield base
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.fixture(scope="session")
def browser() -> Iterator[Any]:
    if not CHROMIUM.exists():
        missing(f"{CHROMIUM} is not installed (apt-get install chromium)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        missing("the playwright Python package is not installed")
    with sync_playwright() as playwright:
        chromium = playwright.chromium.launch(
            executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS
        )
        yield chromium
        chromium.close()


class Guard:
    """Blocks requests to any other host and collects them, with JavaScript errors."""

    def __init__(self, base: str) -> None:
        self.host = urlsplit(base).netloc
        self.external: list[str] = []
        self.errors: list[str] = []

    def route(self, route: Any) -> None:
        url = route.request.url
        if url.startswith(("data:", "blob:")) or urlsplit(url).netloc == self.host:
            route.continue_()
        else:
            self.external.append(url)
            route.abort()

    def check(self) -> None:
        assert not self.external, f"requests left the machine: {self.external}"
        assert not self.errors, f"JavaScript errors: {self.errors}"


def new_context(browser: Any, base: str) -> tuple[Any, Guard]:
    context = browser.new_context(base_url=base, viewport=VIEWPORT)
    context.set_default_timeout(10_000)
    guard = Guard(base)
    context.route("**/*", guard.route)
    return context, guard


def open_page(context: Any, guard: Guard) -> Any:
    page = context.new_page()
    page.on("pageerror", lambda exc: guard.errors.append(str(exc)))
    return page


def sign_in(page: Any, name: str, password: str) -> None:
    page.fill("#signin-name", name)
    page.fill("#signin-password", password)
    page.click("#signin-form button[type=submit]")


@pytest.fixture(scope="session")
def signed_in(browser: Any, server: str) -> Iterator[tuple[Any, Guard]]:
    """A browser context signed in once, through the form, as the technician.

    The tests share it (each gets a new page in it), so plotly.js is fetched only once.
    """
    context, guard = new_context(browser, server)
    page = open_page(context, guard)
    page.goto("/signin")
    sign_in(page, *TECHNICIAN)
    page.wait_for_url(f"{server}/")
    page.close()
    guard.check()
    yield context, guard
    context.close()


@pytest.fixture
def anonymous_page(browser: Any, server: str) -> Iterator[Any]:
    context, guard = new_context(browser, server)
    yield open_page(context, guard)
    context.close()
    guard.check()


@pytest.fixture
def page(signed_in: tuple[Any, Guard]) -> Iterator[Any]:
    """A new signed-in page; the test fails on requests to other hosts or JavaScript errors."""
    context, guard = signed_in
    guard.external.clear()
    guard.errors.clear()
    page = open_page(context, guard)
    yield page
    page.close()
    guard.check()


@pytest.fixture(scope="session")
def artifacts() -> Path:
    """Where screenshots go (gitignored)."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    return ARTIFACTS


# -- page tests without a browser: each module provides ``seeded_file`` ------------------------
@pytest.fixture
def app(seeded_file: Path, tmp_path: Path):
    """An app on a private copy of the module's seeded database file."""
    copy = tmp_path / "sensorledger.db"
    shutil.copyfile(seeded_file, copy)
    return create_app(Settings(database_url=f"sqlite:///{copy}"))


def signed_in_client(app, name: str, password: str) -> TestClient:
    client = TestClient(app)
    answer = client.post(
        "/signin", data={"name": name, "password": password, "next": "/"}, follow_redirects=False
    )
    assert answer.status_code == 303
    # as htmx sends it from every page (hx-headers on <body>); tests of the token leave it out
    client.headers[csrf.HEADER] = csrf.token_of(client.cookies[csrf.COOKIE])
    return client


@pytest.fixture
def client(app) -> Iterator[TestClient]:
    with signed_in_client(app, *TECHNICIAN) as c:
        yield c


@pytest.fixture
def viewer(app) -> Iterator[TestClient]:
    with signed_in_client(app, *VIEWER) as c:
        yield c
