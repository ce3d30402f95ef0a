"""The console in a real browser: Debian's Chromium driven by Playwright against
``evenhand serve`` on a real port and a temporary SQLite database.

The draft's author is refused the approval (four-eyes) and a form stripped of its CSRF token
is refused; a second admin signs in, opens the draft, approves it through the confirmation
page and finds the approval in the history; the browser reports no console error on the
way (a Content-Security-Policy violation is one). Skipped when Chromium or Playwright is missing,
except under CI=true, where that fails.
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy.orm import Session, sessionmaker

from service.demo.server import ServerProcess
from service.settings import Settings
from service.store import lifecycle
from service.store.db import create_db_engine, create_session_factory
from service.store.migrate import upgrade
from tests.helpers import TEST_SECRET, actor, create_key, make_policy
from tests.insert_only import changes_allowed

CHROMIUM = os.environ.get("EVENHAND_TEST_CHROMIUM", "/usr/bin/chromium")


def _unavailable(message: str) -> None:
    if os.environ.get("CI", "").lower() in {"1", "true", "yes"}:
        pytest.fail(message + " (CI=true: the browser test is mandatory)")
    pytest.skip(message)


@pytest.fixture
def served(tmp_path: Path) -> Iterator[tuple[ServerProcess, dict[str, str]]]:
    url = f"sqlite:///{tmp_path / 'console.db'}"
    with changes_allowed():
        upgrade(url)
    engine = create_db_engine(Settings(database_url=url))
    factory: sessionmaker[Session] = create_session_factory(engine)
    tokens = {
        "author": create_key(factory, "admin", "ada-author"),
        "approver": create_key(factory, "admin", "bo-approver"),
    }
    with factory() as session:
        lifecycle.submit(session, "readmission", make_policy(), actor(factory, "ada-author"))
        session.commit()
    engine.dispose()
    server = ServerProcess(
        {"EVENHAND_DATABASE_URL": url, "EVENHAND_DRAW_SECRET": TEST_SECRET},
        tmp_path / "server.log",
    )
    server.start()
    try:
        yield server, tokens
    finally:
        server.stop()


def test_admin_approves_a_draft_in_the_browser(
    served: tuple[ServerProcess, dict[str, str]],
) -> None:
    if shutil.which(CHROMIUM) is None:
        _unavailable(f"no Chromium at {CHROMIUM} (apt-get install chromium)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        _unavailable("the playwright package is not installed (pip install -e '.[test]')")
    server, tokens = served
    errors: list[str] = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            page = browser.new_page()
            page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.on(
                "response",
                lambda r: errors.append(f"{r.status} {r.url}") if r.status >= 400 else None,
            )

            def sign_in(token: str) -> None:
                page.goto(f"{server.base_url}/console")
                assert page.url.endswith("/console/sign-in")
                page.get_by_label("API key").fill(token)
                page.get_by_role("button", name="Sign in").click()
                page.wait_for_url("**/console/policies")

            # The author cannot approve their own draft: the page shows the service's refusal.
            sign_in(tokens["author"])
            page.goto(f"{server.base_url}/console/policies/readmission/confirm/approve?version=1")
            with page.expect_response(lambda r: r.request.method == "POST") as refused:
                page.get_by_role("button", name="Confirm: Approve readmission v1").click()
            assert refused.value.status == 403
            assert "four-eyes rule" in page.get_by_role("alert").inner_text()
            # A form whose CSRF token was taken out is refused too.
            page.locator("input[name=csrf]").first.evaluate("e => e.remove()")
            page.get_by_role("button", name="Sign out").click()
            assert "CSRF" in page.get_by_role("alert").inner_text()
            errors.clear()  # the two refusals above are expected 403s
            page.goto(f"{server.base_url}/console/policies")
            page.get_by_role("button", name="Sign out").click()
            page.wait_for_url("**/console/sign-in")

            sign_in(tokens["approver"])

            page.get_by_role("link", name="readmission").click()
            page.get_by_role("link", name="v1", exact=True).click()
            assert "Cases with a score below 0.3 never get the action" in page.content()
            assert page.locator("svg.chart").count() == 2

            page.get_by_role("link", name="Approve…").click()
            assert "becomes approved" in page.content()
            page.get_by_role("button", name="Confirm: Approve readmission v1").click()
            page.wait_for_url("**/console/policies/readmission")
            history = page.locator("ol.timeline").inner_text()
            assert "approve" in history and "bo-approver" in history
            assert page.locator("span.status-approved").count() == 1

            # The stylesheet loaded under the CSP (it would be refused as an inline style).
            colour = page.evaluate(
                "getComputedStyle(document.querySelector('header.bar')).backgroundColor"
            )
            assert colour == "rgb(29, 36, 48)"

            page.get_by_role("button", name="Sign out").click()
            page.wait_for_url("**/console/sign-in")
            page.goto(f"{server.base_url}/console/policies")
            assert page.url.endswith("/console/sign-in")
        finally:
            browser.close()
    assert errors == [], errors
