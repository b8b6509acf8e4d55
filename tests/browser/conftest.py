"""Headless Chromium (Debian's package, driven by Playwright) against the live server.

Under CI=true these must run; elsewhere they skip when /usr/bin/chromium is missing.
Screenshots go to test-artifacts/ for a person to look at.
"""

import os
import pathlib

import pytest

# The platform fixtures (users, team, detector, split, run_tasks, worker) serve here too.
from tests.platform.conftest import *  # noqa: F403
from tests.platform.test_worker import worker  # noqa: F401

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = pathlib.Path(__file__).resolve().parents[2] / "test-artifacts"

BROWSER_MARKS = [
    pytest.mark.django_db(transaction=True),
    pytest.mark.skipif(
        not os.path.exists(CHROMIUM) and os.environ.get("CI") != "true",
        reason="Debian's chromium is not installed (.ci/run installs it)",
    ),
]


@pytest.fixture(scope="module")
def browser():
    playwright = pytest.importorskip("playwright.sync_api")
    # Playwright's sync API keeps an event loop in this thread; the ORM calls of the
    # test itself are still synchronous (Django's docs on async safety).
    os.environ["DJANGO_ALLOW_ASYNC_UNSAFE"] = "true"
    with playwright.sync_playwright() as p:
        chromium = p.chromium.launch(
            executable_path=CHROMIUM,
            args=[
                "--no-sandbox",
                "--disable-gpu",
                "--disable-quic",
                "--no-first-run",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
            ],
        )
        yield chromium
        chromium.close()
    del os.environ["DJANGO_ALLOW_ASYNC_UNSAFE"]


def signed_in(browser, live_server, username):
    """A page of a new 1280 px context, signed in as ``username`` (password pw-<name>)."""
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    page = context.new_page()
    page.goto(f"{live_server.url}/login/")
    page.fill("#id_username", username)
    page.fill("#id_password", f"pw-{username}")
    page.click("button[type=submit]")
    return page


@pytest.fixture
def page(browser, live_server, users, flushable):
    page = signed_in(browser, live_server, "lead")
    yield page
    page.context.close()


def shot(page, name):
    """A full-page screenshot; a page taller than Chromium captures gets its first 6000 px."""
    ARTIFACTS.mkdir(exist_ok=True)
    height = page.evaluate("document.documentElement.scrollHeight")
    width = page.viewport_size["width"]
    page.screenshot(
        path=str(ARTIFACTS / f"{name}.png"),
        full_page=True,  # a clip without it stops at the viewport's bottom
        clip=None if height <= 6000 else {"x": 0, "y": 0, "width": width, "height": 6000},
    )
