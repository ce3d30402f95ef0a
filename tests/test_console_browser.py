"""The console in a real browser: Debian's Chromium driven by Playwright against
``evenhand serve`` on a real port and a temporary SQLite database.

The draft's author is refused the approval (four-eyes) and a form stripped of its CSRF token
is refused; an admin activates a version through the confirmation page after another change
landed (the 409 shown, then confirmed again) and rolls back with a reason; a draft is
submitted through the console's form (an uploaded file refused with its field, then pasted
text); a person signs in with the password an admin set; a second admin signs in, opens
the draft, approves it through the confirmation page and finds the approval in the
history; the browser reports no console error on the way (a Content-Security-Policy
violation is one). The auditor signs in, opens a month's
report, the months per group and check, a decision and the log's verification, and the API
docs page draws itself: with every request to another host refused (none is made).
Skipped when Chromium or Playwright is missing, except under CI=true, where that fails.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy.orm import Session, sessionmaker

from service.demo.server import ServerProcess
from service.settings import Settings
from service.store import lifecycle
from service.store.db import create_db_engine, create_session_factory
from service.store.migrate import upgrade
from tests.browser_helpers import CHROMIUM, Watch, need_browser, watched_page
from tests.helpers import TEST_SECRET, actor, bearer, create_key, make_policy, make_request
from tests.insert_only import changes_allowed


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
    need_browser()
    from playwright.sync_api import sync_playwright

    server, tokens = served
    watch = Watch()
    errors = watch.errors
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            page = watched_page(browser, server.base_url, watch)

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
            assert page.url.endswith("/console/sign-in?next=/console/policies")
        finally:
            browser.close()
    assert errors == [], errors
    assert watch.elsewhere == [], watch.elsewhere


@dataclass
class Audited:
    server: ServerProcess
    auditor: str
    month: str
    recommendation_id: str
    case_id: str


@pytest.fixture
def audited(tmp_path: Path) -> Iterator[Audited]:
    """A live policy with targets, decisions with outcomes and a month's audit, all made
    through the served API."""
    from tests.audit_helpers import audit_policy

    url = f"sqlite:///{tmp_path / 'audit.db'}"
    with changes_allowed():
        upgrade(url)
    engine = create_db_engine(Settings(database_url=url))
    factory: sessionmaker[Session] = create_session_factory(engine)
    author, approver, scorer, auditor = (
        create_key(factory, role, name)
        for role, name in (
            ("admin", "ada-author"),
            ("admin", "bo-approver"),
            ("scoring", "ward-feed"),
            ("audit", "cy-auditor"),
        )
    )
    engine.dispose()
    server = ServerProcess(
        {"EVENHAND_DATABASE_URL": url, "EVENHAND_DRAW_SECRET": TEST_SECRET},
        tmp_path / "server.log",
    )
    server.start()
    try:
        with httpx.Client(base_url=server.base_url, timeout=30) as api:
            r = api.post(
                "/v1/policies/readmission/versions", json=audit_policy(), headers=bearer(author)
            )
            assert r.status_code == 201, r.text
            r = api.post("/v1/policies/readmission/versions/1/approve", headers=bearer(approver))
            assert r.status_code == 200, r.text
            body = {"version": 1, "reason": "go", "expected_current": None}
            r = api.post("/v1/policies/readmission/activate", json=body, headers=bearer(author))
            assert r.status_code == 200, r.text
            now = datetime.now(UTC).isoformat()
            items = [
                make_request(
                    score=(i % 20) / 20 + 0.025,
                    attributes={"region": ("north", "south", "east")[i % 3]},
                )
                for i in range(150)
            ]
            r = api.post("/v1/recommendations/batch", json={"items": items}, headers=bearer(scorer))
            assert r.status_code == 201, r.text
            decided = r.json()["items"]
            outcomes = [
                {
                    "recommendation_id": d["recommendation_id"],
                    "outcome": int(i % 20 >= 8),
                    "source": "records",
                    "observed_at": now,
                }
                for i, d in enumerate(decided)
            ]
            r = api.post("/v1/outcomes/batch", json={"items": outcomes}, headers=bearer(scorer))
            assert r.status_code == 201, r.text
            month = datetime.now(UTC).strftime("%Y-%m")
            body = {"policy": "readmission", "month": month, "provisional": True}
            r = api.post("/v1/audits", json=body, headers=bearer(auditor))
            assert r.status_code == 201, r.text
        yield Audited(
            server, auditor, month, decided[0]["recommendation_id"], decided[0]["case_id"]
        )
    finally:
        server.stop()


def test_the_auditor_reads_a_report_and_a_decision_offline(audited: Audited) -> None:
    need_browser()
    from playwright.sync_api import sync_playwright

    base = audited.server.base_url
    watch = Watch()  # the network is cut off: a request to any other host fails (recorded)
    errors, elsewhere = watch.errors, watch.elsewhere
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            page = watched_page(browser, base, watch)
            page.goto(f"{base}/console")
            page.get_by_label("API key").fill(audited.auditor)
            page.get_by_role("button", name="Sign in").click()
            page.wait_for_url("**/console/policies")

            # The month's report: the checks table, maturity and the downloads.
            page.get_by_role("link", name="Reports").click()
            page.get_by_role("link", name="readmission").click()
            page.get_by_role("link", name=audited.month, exact=True).click()
            page.wait_for_url(f"**/console/reports/readmission/{audited.month}")
            assert page.get_by_role("heading", level=1).inner_text() == (
                f"readmission: audit of {audited.month}"
            )
            checks = page.locator("table", has_text="Equivalence p (adjusted)")
            assert checks.locator("tbody tr").count() > 0
            assert page.get_by_role("link", name="Month bundle (.ehb)").count() == 1
            # The months per group and check.
            page.get_by_role("link", name="The twelve months up to").click()
            page.wait_for_url("**/console/reports/readmission/history**")
            assert page.locator("h2", has_text="north").count() > 0

            # One decision, looked up by its id.
            page.get_by_role("link", name="Decisions").click()
            page.get_by_label("Recommendation id").fill(audited.recommendation_id)
            page.get_by_role("button", name="Look up", exact=True).click()
            page.wait_for_url("**/console/decisions?id=*")
            text = page.locator("main").inner_text()
            assert audited.case_id in text and "readmission v1" in text
            assert "records" in text  # the outcome's source: the outcome is shown

            # The log: the head and a verification run.
            page.get_by_role("link", name="Log").click()
            page.get_by_role("button", name="Verify the log now").click()
            for _ in range(300):  # the run goes on in the server: reload until it is kept
                status = page.get_by_role("status").inner_text()
                if not status.startswith("Running"):
                    break
                page.wait_for_timeout(100)
                page.reload()
            assert status.startswith("Verified"), status

            # The API docs page draws itself from this host alone.
            page.goto(f"{base}/docs")
            page.wait_for_selector(".swagger-ui .info .title")
            assert "Evenhand" in page.locator(".swagger-ui .info .title").inner_text()
            assert page.get_by_role("button", name="Authorize").count() == 1
        finally:
            browser.close()
    assert elsewhere == [], elsewhere
    assert errors == [], errors


@pytest.fixture
def lifecycle_served(tmp_path: Path) -> Iterator[tuple[ServerProcess, dict[str, str]]]:
    """readmission v1 active; v2 and v3 approved (submitted by one admin, approved by
    another), for activation, a stale activation and a rollback."""
    url = f"sqlite:///{tmp_path / 'lifecycle.db'}"
    with changes_allowed():
        upgrade(url)
    engine = create_db_engine(Settings(database_url=url))
    factory: sessionmaker[Session] = create_session_factory(engine)
    tokens = {
        "author": create_key(factory, "admin", "ada-author"),
        "approver": create_key(factory, "admin", "bo-approver"),
    }
    author, approver = actor(factory, "ada-author"), actor(factory, "bo-approver")
    south = {"steps": [{"from": 0.2, "probability": 0.5}, {"from": 0.4, "probability": 1.0}]}
    with factory() as session:
        for cut in (0.3, 0.35, 0.45):
            rules = {"north": {"steps": [{"from": cut, "probability": 1.0}]}, "south": south}
            view = lifecycle.submit(session, "readmission", make_policy(rules=rules), author)
            lifecycle.approve(session, "readmission", view.row.version, approver)
        lifecycle.activate(session, "readmission", 1, author, "first", expected_current=None)
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


def _sign_in(page: Any, base_url: str, token: str) -> None:
    page.goto(f"{base_url}/console")
    assert page.url.endswith("/console/sign-in")
    page.get_by_label("API key").fill(token)
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url("**/console/policies")


def test_activate_through_the_confirmation_page_then_roll_back(
    lifecycle_served: tuple[ServerProcess, dict[str, str]],
) -> None:
    need_browser()
    from playwright.sync_api import sync_playwright

    server, tokens = lifecycle_served
    watch = Watch()
    errors = watch.errors
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            page = watched_page(browser, server.base_url, watch)
            _sign_in(page, server.base_url, tokens["approver"])
            page.get_by_role("link", name="readmission").click()
            page.get_by_role("link", name="v2", exact=True).click()
            page.get_by_role("link", name="Activate…").click()
            assert "expected current active version: v1" in page.content()
            # Another admin activates v3 through the API while this page is open.
            body = {"version": 3, "reason": "elsewhere", "expected_current": 1}
            r = httpx.post(
                f"{server.base_url}/v1/policies/readmission/activate",
                json=body,
                headers=bearer(tokens["author"]),
                timeout=30,
            )
            assert r.status_code == 200, r.text
            page.get_by_label("Reason (optional)").fill("tighter north cut")
            with page.expect_response(lambda r: r.request.method == "POST") as refused:
                page.get_by_role("button", name="Confirm: Activate readmission v2").click()
            assert refused.value.status == 409
            alert = page.get_by_role("alert").inner_text()
            assert "current_changed" in alert
            assert "the request expected v1 as the active version but v3 is" in alert
            # The page was read afresh: its guard now names v3; confirming again works.
            assert "expected current active version: v3" in page.content()
            errors.clear()  # the refusal above is an expected 409
            page.get_by_label("Reason (optional)").fill("tighter north cut")
            page.get_by_role("button", name="Confirm: Activate readmission v2").click()
            page.wait_for_url("**/console/policies/readmission")
            assert "Active: v2" in page.locator("p.summary").inner_text()

            # Roll back: the confirmation page needs a reason.
            page.get_by_role("link", name="Roll back…").click()
            assert "Roll back readmission to v3" in page.content()
            page.get_by_label("Reason (required)").fill("alerts on the north group")
            page.get_by_role("button", name="Confirm: Roll back readmission to v3").click()
            page.wait_for_url("**/console/policies/readmission")
            assert "Active: v3" in page.locator("p.summary").inner_text()
            latest = page.locator("ol.timeline li").first.inner_text()
            assert "rollback" in latest and "v2 → v3" in latest and "bo-approver" in latest
            assert "Why: alerts on the north group" in latest
        finally:
            browser.close()
    assert errors == [], errors
    assert watch.elsewhere == [], watch.elsewhere
    r = httpx.get(
        f"{server.base_url}/v1/policies/readmission/history",
        headers=bearer(tokens["author"]),
        timeout=30,
    )
    last = r.json()[-1]
    assert last["action"] == "rollback" and last["reason"] == "alerts on the north group"
    assert last["actor"] == "bo-approver"


def test_submit_a_draft_through_the_console_form(
    served: tuple[ServerProcess, dict[str, str]], tmp_path: Path
) -> None:
    need_browser()
    import json

    from playwright.sync_api import sync_playwright

    server, tokens = served
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(make_policy(costs={"false_positive": -1, "false_negative": 4})))
    good = make_policy(description="second version")
    watch = Watch()
    errors = watch.errors
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            page = watched_page(browser, server.base_url, watch)
            _sign_in(page, server.base_url, tokens["author"])
            page.get_by_role("link", name="Submit a draft…").click()
            page.get_by_label("Policy name").fill("readmission")
            # An uploaded file with an invalid cost: the service's field and reason shown.
            page.get_by_label("…or upload a JSON file").set_input_files(str(bad))
            with page.expect_response(lambda r: r.request.method == "POST") as refused:
                page.get_by_role("button", name="Check the document…").click()
            assert refused.value.status == 422
            alert = page.get_by_role("alert").inner_text()
            assert "invalid_policy" in alert and "costs.false_positive" in alert
            errors.clear()  # the refusal above is an expected 422
            # Pasted text this time (the file input is empty again on the re-drawn form).
            page.get_by_label("Policy document (JSON)").fill(json.dumps(good, indent=2))
            page.get_by_role("button", name="Check the document…").click()
            assert "Submit readmission v2 as a draft?" in page.content()
            assert "from 0.2 up to (not including) 0.4 they get it with probability 0.5" in (
                page.content()
            )
            page.get_by_role("button", name="Confirm: submit readmission as a draft").click()
            page.wait_for_url("**/console/policies/readmission/versions/2")
            assert "second version" in page.content()
            assert page.locator("span.status-draft").count() == 1
            assert "ada-author" in page.locator("dl.facts").inner_text()
            page.get_by_role("link", name="compare with v1").click()
            assert "Description changed from 'test policy' to 'second version'" in (
                page.locator("ul.settings-changes").inner_text()
            )
        finally:
            browser.close()
    assert errors == [], errors
    assert watch.elsewhere == [], watch.elsewhere


def test_a_person_signs_in_with_a_password_an_admin_set(
    served: tuple[ServerProcess, dict[str, str]],
) -> None:
    need_browser()
    from playwright.sync_api import sync_playwright

    server, tokens = served
    password = "long enough password"
    watch = Watch()
    errors = watch.errors
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            page = watched_page(browser, server.base_url, watch)
            _sign_in(page, server.base_url, tokens["author"])
            page.get_by_role("link", name="People").click()
            page.get_by_label("Name", exact=True).fill("bo")
            page.get_by_label("API key the name stands for").fill(tokens["approver"])
            page.get_by_label("Password (at least 12 characters)").fill(password)
            page.get_by_label("The password again").fill(password)
            page.get_by_role("button", name="Set the password").click()
            assert "bo can now sign in with a password, as key bo-approver" in (
                page.get_by_role("status").inner_text()
            )
            page.get_by_role("button", name="Sign out").click()
            page.wait_for_url("**/console/sign-in")
            page.get_by_label("Name", exact=True).fill("bo")
            page.get_by_label("Password", exact=True).fill(password)
            page.get_by_role("button", name="Use the password").click()
            page.wait_for_url("**/console/policies")
            assert "bo-approver" in page.locator("header form.who").inner_text()
        finally:
            browser.close()
    assert errors == [], errors
    assert watch.elsewhere == [], watch.elsewhere
