"""The console through FastAPI's TestClient, on SQLite and PostgreSQL: sign-in, session
cookie, CSRF, security headers, roles, the confirmed lifecycle actions and reports."""

from __future__ import annotations

import hashlib
import itertools
import re
from collections.abc import Callable
from datetime import UTC, datetime, timedelta

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.console.rule_view import describe_rule, rule_chart
from service.console.sessions import SessionStore
from service.policy.document import Rule
from service.store.console_sessions import ConsoleSessionRow
from tests.helpers import actor, bearer, make_policy, make_request

CSRF = re.compile(r'name="csrf" value="([^"]+)"')


# Where a signed-out GET of the policy list is sent: sign in, then back to the list.
SIGNED_OUT = "/console/sign-in?next=/console/policies"


def csrf_of(html: str) -> str:
    found = CSRF.search(html)
    assert found is not None, html
    return found.group(1)


def sign_in(client: TestClient, token: str) -> str:
    """Sign in; returns the session's CSRF token (from the next page)."""
    page = client.get("/console/sign-in")
    r = client.post(
        "/console/sign-in",
        data={"csrf": csrf_of(page.text), "api_key": token},
        follow_redirects=False,
    )
    assert r.status_code == 303, r.text
    listing = client.get("/console/policies")
    assert listing.status_code == 200
    return csrf_of(listing.text)


def submit(client: TestClient, token: str, **overrides: object) -> int:
    r = client.post(
        "/v1/policies/readmission/versions", json=make_policy(**overrides), headers=bearer(token)
    )
    assert r.status_code == 201, r.text
    return int(r.json()["version"])


def test_sign_in_with_a_good_key_sets_a_strict_http_only_session_cookie(
    client: TestClient, tokens: dict[str, str]
) -> None:
    page = client.get("/console/sign-in")
    r = client.post(
        "/console/sign-in",
        data={"csrf": csrf_of(page.text), "api_key": tokens["admin"]},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == "/console/policies"
    cookie = next(c for c in r.headers.get_list("set-cookie") if c.startswith("evenhand_console="))
    assert "HttpOnly" in cookie and "SameSite=strict" in cookie and "Path=/console" in cookie
    assert "Secure" not in cookie  # plain HTTP and the setting off
    # The cookie holds a random session id, never the key.
    assert tokens["admin"] not in cookie
    assert "admin-author" in client.get("/console/policies").text


def test_cookie_is_secure_over_https(client: TestClient, tokens: dict[str, str]) -> None:
    secure = TestClient(client.app, base_url="https://testserver")
    page = secure.get("/console/sign-in")
    assert "Secure" in page.headers["set-cookie"]
    r = secure.post(
        "/console/sign-in",
        data={"csrf": csrf_of(page.text), "api_key": tokens["audit"]},
        follow_redirects=False,
    )
    assert "Secure" in r.headers["set-cookie"]


@pytest.mark.parametrize("key", ["eh_" + "A" * 43, "not-a-key", ""])
def test_bad_keys_are_refused(client: TestClient, tokens: dict[str, str], key: str) -> None:
    page = client.get("/console/sign-in")
    r = client.post("/console/sign-in", data={"csrf": csrf_of(page.text), "api_key": key})
    assert r.status_code == 401
    assert "Unknown or revoked API key" in r.text
    assert client.get("/console/policies", follow_redirects=False).status_code == 303


def test_scoring_key_cannot_sign_in(client: TestClient, tokens: dict[str, str]) -> None:
    page = client.get("/console/sign-in")
    r = client.post(
        "/console/sign-in", data={"csrf": csrf_of(page.text), "api_key": tokens["scoring"]}
    )
    assert r.status_code == 403
    assert "cannot sign in" in r.text
    r = client.get("/console/policies", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == SIGNED_OUT


def test_sign_in_without_or_with_wrong_csrf_is_refused(
    client: TestClient, tokens: dict[str, str]
) -> None:
    client.get("/console/sign-in")
    r = client.post("/console/sign-in", data={"api_key": tokens["admin"]})
    assert r.status_code == 403 and "CSRF" in r.text
    r = client.post("/console/sign-in", data={"csrf": "wrong", "api_key": tokens["admin"]})
    assert r.status_code == 403


def test_security_headers_on_every_console_response(
    client: TestClient, tokens: dict[str, str]
) -> None:
    for path in ("/console/sign-in", "/console/static/console.css", "/console/policies"):
        r = client.get(path, follow_redirects=False)
        csp = r.headers["content-security-policy"]
        assert "default-src 'none'" in csp and "frame-ancestors 'none'" in csp
        assert "unsafe-inline" not in csp and "script-src" not in csp
        assert r.headers["x-frame-options"] == "DENY"
        assert r.headers["x-content-type-options"] == "nosniff"
        assert r.headers["referrer-policy"] == "no-referrer"
    # No inline style or script in the pages themselves.
    sign_in(client, tokens["admin"])
    submit(client, tokens["admin"])
    for path in ("/console/policies", "/console/policies/readmission/versions/1"):
        html = client.get(path).text
        assert "<script" not in html and "<style" not in html and "style=" not in html


def test_sign_out_ends_the_session(client: TestClient, tokens: dict[str, str]) -> None:
    csrf = sign_in(client, tokens["audit"])
    r = client.post("/console/sign-out", data={}, follow_redirects=False)
    assert r.status_code == 403  # no CSRF token: still signed in
    r = client.post("/console/sign-out", data={"csrf": csrf}, follow_redirects=False)
    assert r.status_code == 303
    assert client.get("/console/policies", follow_redirects=False).status_code == 303


def test_session_expires_when_idle_and_after_its_lifetime(
    session_factory: sessionmaker[Session], tokens: dict[str, str]
) -> None:
    start = datetime(2026, 12, 1, 9, 0, tzinfo=UTC)
    now = [start]
    store = SessionStore(session_factory, 60, 300, clock=lambda: now[0])
    key = actor(session_factory, "auditor").key_id
    sid = store.create(key, "auditor", "audit")
    now[0] = start + timedelta(seconds=59)
    assert store.get(sid) is not None
    now[0] = start + timedelta(seconds=59 + 61)
    assert store.get(sid) is None  # idle too long
    start = now[0]
    sid = store.create(key, "auditor", "audit")
    for step in range(1, 8):
        now[0] = start + timedelta(seconds=50 * step)
        seen = store.get(sid)
        assert (seen is not None) == (50 * step < 300)  # active, but not past its lifetime
    with session_factory() as db:  # expired rows are gone, not just ignored
        assert db.scalar(select(func.count()).select_from(ConsoleSessionRow)) == 0


def test_the_session_table_holds_no_usable_secret(
    client: TestClient, tokens: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    sign_in(client, tokens["admin"])
    cookie = client.cookies["evenhand_console"]
    with session_factory() as db:
        row = db.scalars(select(ConsoleSessionRow)).one()
    assert row.id_hash == hashlib.sha256(cookie.encode()).hexdigest()
    assert cookie not in row.id_hash and tokens["admin"] not in repr(row.__dict__)
    assert (row.key_name, row.role) == ("admin-author", "admin")


def test_signing_in_again_ends_the_earlier_session(
    client: TestClient, tokens: dict[str, str]
) -> None:
    sign_in(client, tokens["admin"])
    first = client.cookies["evenhand_console"]
    sign_in(client, tokens["audit"])
    assert client.cookies["evenhand_console"] != first
    assert "auditor" in client.get("/console/policies").text
    old = TestClient(client.app, cookies={"evenhand_console": first})
    r = old.get("/console/policies", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == SIGNED_OUT
    current = TestClient(
        client.app, cookies={"evenhand_console": client.cookies["evenhand_console"]}
    )
    assert current.get("/console/policies", follow_redirects=False).status_code == 200


def test_expired_session_is_sent_to_sign_in(client: TestClient, tokens: dict[str, str]) -> None:
    sign_in(client, tokens["admin"])
    store = client.app.state.console_sessions  # type: ignore[attr-defined]
    store.idle_seconds = 0.0
    r = client.get("/console/policies", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == SIGNED_OUT


def test_revoked_key_ends_its_sessions(client: TestClient, tokens: dict[str, str]) -> None:
    sign_in(client, tokens["audit"])
    r = client.post(
        "/v1/keys/auditor/revoke", json={"reason": "left"}, headers=bearer(tokens["admin"])
    )
    assert r.status_code == 200, r.text
    assert client.get("/console/policies", follow_redirects=False).status_code == 303


def test_audit_role_reads_policies_but_cannot_act(
    client: TestClient, tokens: dict[str, str]
) -> None:
    submit(client, tokens["admin"])
    csrf = sign_in(client, tokens["audit"])
    page = client.get("/console/policies/readmission")
    assert page.status_code == 200 and "v1" in page.text
    assert "confirm/approve" not in page.text  # no action links for auditors
    assert client.get("/console/policies/readmission/confirm/approve?version=1").status_code == 403
    r = client.post(
        "/console/policies/readmission/confirm/approve", data={"csrf": csrf, "version": "1"}
    )
    assert r.status_code == 403
    history = client.get("/v1/policies/readmission/history", headers=bearer(tokens["admin"]))
    assert [e["action"] for e in history.json()] == ["submit"]


def test_action_without_csrf_is_refused(client: TestClient, tokens: dict[str, str]) -> None:
    submit(client, tokens["admin"])
    sign_in(client, tokens["admin2"])
    for data in ({"version": "1"}, {"version": "1", "csrf": "x" * 43}):
        r = client.post("/console/policies/readmission/confirm/approve", data=data)
        assert r.status_code == 403 and "CSRF" in r.text
    r = client.get("/v1/policies/readmission/versions/1", headers=bearer(tokens["admin"]))
    assert r.json()["status"] == "draft"


def test_author_cannot_approve_own_draft(client: TestClient, tokens: dict[str, str]) -> None:
    submit(client, tokens["admin"])
    csrf = sign_in(client, tokens["admin"])
    r = client.post(
        "/console/policies/readmission/confirm/approve", data={"csrf": csrf, "version": "1"}
    )
    assert r.status_code == 403
    assert "four-eyes rule" in r.text and "four_eyes" in r.text


def test_approve_activate_and_history(client: TestClient, tokens: dict[str, str]) -> None:
    submit(client, tokens["admin"])
    csrf = sign_in(client, tokens["admin2"])
    confirm = client.get("/console/policies/readmission/confirm/approve?version=1")
    assert "becomes approved" in confirm.text
    r = client.post(
        "/console/policies/readmission/confirm/approve",
        data={"csrf": csrf, "version": "1"},
        follow_redirects=False,
    )
    assert r.status_code == 303
    confirm = client.get("/console/policies/readmission/confirm/activate?version=1")
    assert "expected current active version: none" in confirm.text
    assert 'name="expected_current" value="none"' in confirm.text
    r = client.post(
        "/console/policies/readmission/confirm/activate",
        data={"csrf": csrf, "version": "1", "expected_current": "none", "reason": "first"},
    )
    assert r.status_code == 200  # followed to the policy page
    assert "admin-approver" in r.text and "first" in r.text
    history = client.get("/v1/policies/readmission/history", headers=bearer(tokens["admin"]))
    events = [(e["action"], e["actor"]) for e in history.json()]
    assert events == [
        ("submit", "admin-author"),
        ("approve", "admin-approver"),
        ("activate", "admin-approver"),
    ]


def test_activate_with_stale_expected_version_shows_the_409(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()  # v1 active
    submit(client, tokens["admin"], description="second")
    client.post("/v1/policies/readmission/versions/2/approve", headers=bearer(tokens["admin2"]))
    csrf = sign_in(client, tokens["admin2"])
    r = client.post(
        "/console/policies/readmission/confirm/activate",
        data={"csrf": csrf, "version": "2", "expected_current": "none"},
    )
    assert r.status_code == 409
    assert "current_changed" in r.text
    api = client.post(
        "/v1/policies/readmission/activate",
        json={"version": 2, "expected_current": None},
        headers=bearer(tokens["admin"]),
    )
    message = api.json()["error"]["message"]
    from html import escape

    assert escape(message) in r.text  # the service's own message, as the API gives it
    assert "expected current active version: v1" in r.text  # the page, read again


def test_rollback_and_shadow_through_the_console(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    publish(make_policy(description="second"))  # v2 active, v1 retired
    publish(make_policy(description="third"), activate=False)  # v3 approved
    csrf = sign_in(client, tokens["admin"])
    page = client.get("/console/policies/readmission/confirm/rollback")
    assert "v1 becomes the active version again; v2 retires" in page.text
    r = client.post(
        "/console/policies/readmission/confirm/rollback",
        data={"csrf": csrf, "to_version": "1", "expected_current": "2"},
    )
    assert r.status_code == 422 and "reason" in r.text  # a rollback needs a reason
    r = client.post(
        "/console/policies/readmission/confirm/rollback",
        data={"csrf": csrf, "to_version": "1", "expected_current": "2", "reason": "bad rates"},
    )
    assert r.status_code == 200 and "bad rates" in r.text
    for action, data in (
        ("shadow-on", {"version": "3", "expected_current": "none"}),
        ("shadow-off", {"expected_current": "3"}),
    ):
        r = client.post(
            f"/console/policies/readmission/confirm/{action}", data={"csrf": csrf, **data}
        )
        assert r.status_code == 200, r.text
    state = client.get("/v1/policies", headers=bearer(tokens["admin"])).json()[0]
    assert (state["active_version"], state["shadow_version"]) == (1, None)


def test_version_page_describes_each_rule(client: TestClient, tokens: dict[str, str]) -> None:
    submit(client, tokens["admin"])
    sign_in(client, tokens["audit"])
    page = client.get("/console/policies/readmission/versions/1").text
    assert "at or above 0.3 they always get it" in page
    assert "from 0.2 up to (not including) 0.4 they get it with probability 0.5" in page
    assert page.count("<svg") == 2 and 'class="band"' in page


def test_reports_are_for_the_audit_role(client: TestClient, tokens: dict[str, str]) -> None:
    submit(client, tokens["admin"])
    sign_in(client, tokens["admin"])
    assert client.get("/console/reports").status_code == 403
    client.cookies.clear()
    sign_in(client, tokens["audit"])
    r = client.get("/console/reports/readmission")
    assert r.status_code == 200 and "No audit of readmission" in r.text
    assert client.get("/console/reports/readmission/2026-10/report.html").status_code == 404


def test_rule_sentence_and_chart() -> None:
    rule = Rule.band(0.30, 0.42, 0.5)
    assert describe_rule(rule) == (
        "Cases with a score below 0.3 never get the action; from 0.3 up to (not including) "
        "0.42 they get it with probability 0.5; at or above 0.42 they always get it."
    )
    chart = rule_chart(rule, (0.0, 1.0))
    # 40 px left margin, 308 px plot width, 124 px plot height from y=12.
    assert chart.points.split() == [
        "40,136",
        "132.4,136",
        "132.4,74",
        "169.36,74",
        "169.36,12",
        "348,12",
    ]
    assert [b.label for b in chart.bands] == ["probability 0.5"]
    # Read the drawn level back at each score: the last horizontal segment starting at or
    # left of the score's x (the chart rounds to 0.01 px) must sit at the rule's probability.
    pairs = [tuple(map(float, p.split(","))) for p in chart.points.split()]
    flats = [(x1, y1) for (x1, y1), (x2, y2) in itertools.pairwise(pairs) if y1 == y2]
    for score in (0.0, 0.29, 0.3, 0.41, 0.42, 1.0):
        px = round(40 + score * 308, 2)
        y = [y1 for x1, y1 in flats if x1 <= px][-1]
        assert 1 - (y - 12) / 124 == pytest.approx(rule.probability_at(score))


def test_report_files_match_the_api_and_the_html_has_its_own_policy(
    client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]
) -> None:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    for i in range(6):
        body = make_request(score=0.1 * i + 0.05, attributes={"region": ("north", "south")[i % 2]})
        r = client.post("/v1/recommendations", json=body, headers=bearer(tokens["scoring"]))
        assert r.status_code in (200, 201), r.text
    month = datetime.now(UTC).strftime("%Y-%m")  # the service's time zone is UTC
    audit = bearer(tokens["audit"])
    r = client.post(
        "/v1/audits",
        json={"policy": "readmission", "month": month, "provisional": True},
        headers=audit,
    )
    assert r.status_code == 201, r.text
    sign_in(client, tokens["audit"])
    months = client.get("/console/reports/readmission")
    assert months.status_code == 200 and month in months.text
    assert f"/console/reports/readmission/{month}/report.html" in months.text
    for kind, api_suffix in (("json", ""), ("csv", ".csv"), ("html", ".html")):
        mine = client.get(f"/console/reports/readmission/{month}/report.{kind}")
        api = client.get(f"/v1/reports/readmission/{month}{api_suffix}", headers=audit)
        assert mine.status_code == 200 and mine.content == api.content
        assert mine.headers["x-content-type-options"] == "nosniff"
    html = client.get(f"/console/reports/readmission/{month}/report.html")
    csp = html.headers["content-security-policy"]
    # The stored report keeps its inline stylesheet: allowed for it alone, and no script.
    assert "style-src 'unsafe-inline'" in csp and "sandbox" in csp
    assert "script" not in csp and "frame-ancestors 'none'" in csp
    assert client.get(f"/console/reports/readmission/{month}/report.pdf").status_code == 404


# --- a new draft from the console -------------------------------------------------------------


def test_submit_a_draft_through_the_confirmation_page(
    client: TestClient, tokens: dict[str, str]
) -> None:
    import json

    csrf = sign_in(client, tokens["admin"])
    text = json.dumps(make_policy())
    r = client.post(
        "/console/drafts",
        data={"csrf": csrf, "step": "check", "name": "readmission", "document": text},
    )
    assert r.status_code == 200, r.text
    # The confirmation page: each group's rule in a sentence, as rule_view writes it.
    south = Rule.model_validate(make_policy()["rules"]["south"])
    assert describe_rule(south) in r.text
    assert "readmission v1 is stored as a draft" in r.text
    assert (
        client.get("/v1/policies/readmission/versions", headers=bearer(tokens["admin"])).status_code
        == 404
    )
    digest = re.search(r'name="content_hash" value="([0-9a-f]+)"', r.text)
    assert digest is not None
    r = client.post(
        "/console/drafts",
        data={
            "csrf": csrf,
            "step": "confirm",
            "name": "readmission",
            "document": text,
            "content_hash": digest.group(1),
        },
        follow_redirects=False,
    )
    assert (
        r.status_code == 303 and r.headers["location"] == "/console/policies/readmission/versions/1"
    )
    stored = client.get("/v1/policies/readmission/versions/1", headers=bearer(tokens["admin"]))
    assert stored.json()["author"] == "admin-author"
    assert stored.json()["status"] == "draft"
    # Four-eyes holds for a console-submitted draft: its author cannot approve it.
    r = client.post("/v1/policies/readmission/versions/1/approve", headers=bearer(tokens["admin"]))
    assert r.status_code == 403 and r.json()["error"]["code"] == "four_eyes"


def test_submit_by_file_upload(client: TestClient, tokens: dict[str, str]) -> None:
    import json

    csrf = sign_in(client, tokens["admin"])
    r = client.post(
        "/console/drafts",
        data={"csrf": csrf, "step": "check", "name": "readmission", "document": ""},
        files={"upload": ("policy.json", json.dumps(make_policy()).encode(), "application/json")},
    )
    assert r.status_code == 200, r.text
    assert "Submit readmission v1 as a draft?" in r.text


def test_submit_errors_show_field_and_reason_of_the_api(
    client: TestClient, tokens: dict[str, str]
) -> None:
    import json

    csrf = sign_in(client, tokens["admin"])
    bad = make_policy(costs={"false_positive": -1.0, "false_negative": 4.0})
    api = client.post(
        "/v1/policies/readmission/versions", json=bad, headers=bearer(tokens["admin"])
    )
    assert api.status_code == 422
    r = client.post(
        "/console/drafts",
        data={"csrf": csrf, "step": "check", "name": "readmission", "document": json.dumps(bad)},
    )
    assert r.status_code == 422
    assert "costs.false_positive" in r.text
    import html

    api_messages = {d["message"] for d in api.json()["error"].get("details", [])} or {
        api.json()["error"]["message"]
    }
    assert any(html.escape(m) in r.text for m in api_messages), (api.json(), r.text)
    r = client.post(
        "/console/drafts",
        data={"csrf": csrf, "step": "check", "name": "readmission", "document": "{not json"},
    )
    assert r.status_code == 422 and "malformed_json" in r.text and "line 1, column 2" in r.text
    r = client.post(
        "/console/drafts",
        data={
            "csrf": csrf,
            "step": "check",
            "name": "other",
            "document": json.dumps(make_policy()),
        },
    )
    assert r.status_code == 422 and "name_mismatch" in r.text
    # Without the CSRF token, or as an auditor, nothing is checked or stored.
    r = client.post("/console/drafts", data={"step": "confirm", "name": "readmission"})
    assert r.status_code == 403 and "csrf_failed" in r.text


def test_submit_refuses_a_document_other_than_the_one_confirmed(
    client: TestClient, tokens: dict[str, str]
) -> None:
    import json

    csrf = sign_in(client, tokens["admin"])
    r = client.post(
        "/console/drafts",
        data={
            "csrf": csrf,
            "step": "confirm",
            "name": "readmission",
            "document": json.dumps(make_policy()),
            "content_hash": "0" * 64,
        },
    )
    assert r.status_code == 422 and "document_changed" in r.text
    assert (
        client.get("/v1/policies/readmission/versions", headers=bearer(tokens["admin"])).status_code
        == 404
    )


# --- the diff of two versions -------------------------------------------------------------


def test_diff_page_in_sentences_and_one_chart_per_rule(
    client: TestClient, tokens: dict[str, str]
) -> None:
    import html

    from service.console.rule_view import compare_chart

    first = make_policy()
    second = make_policy(
        costs={"false_positive": 1.0, "false_negative": 6.0},
        groups={"attributes": ["region"], "known": ["north", "south", "east"]},
        rules={
            "north": first["rules"]["north"],
            "south": {
                "steps": [{"from": 0.25, "probability": 0.4}, {"from": 0.5, "probability": 1.0}]
            },
            "east": {"steps": [{"from": 0.6, "probability": 1.0}]},
        },
    )
    submit(client, tokens["admin"], **first)
    submit(client, tokens["admin"], **second)
    sign_in(client, tokens["audit"])  # auditors read the diff too
    version_page = client.get("/console/policies/readmission/versions/2")
    assert 'href="/console/policies/readmission/diff?from=1&amp;to=2"' in version_page.text
    assert "compare with v1" in version_page.text
    r = client.get("/console/policies/readmission/diff?from=1&to=2")
    assert r.status_code == 200, r.text
    page = r.text
    api = client.get(
        "/v1/policies/readmission/diff?from=1&to=2", headers=bearer(tokens["admin"])
    ).json()
    # Every changed setting the API names is on the page (rules are shown as sentences).
    for change in api["changes"]:
        if not change["section"].startswith("rules["):
            assert change["text"][1:] in html.unescape(page), change
    assert "Group 'east' added." in html.unescape(page)
    south_a = Rule.model_validate(first["rules"]["south"])
    south_b = Rule.model_validate(second["rules"]["south"])
    east = Rule.model_validate(second["rules"]["east"])
    for rule in (south_a, south_b, east):
        assert describe_rule(rule) in page
    # Both versions of a rule on one chart: the drawn lines are rule_chart's over the range.
    chart = compare_chart(south_a, south_b, (0.0, 1.0))
    assert chart.before is not None and chart.after is not None
    assert f'class="step" points="{chart.before.points}"' in page
    assert f'class="step-after" points="{chart.after.points}"' in page
    # The added rule has no line for v1.
    section = page[page.index("<h3>east") :]
    section = section[: section.index("</section>")]
    assert 'class="step"' not in section and 'class="step-after"' in section
    assert "No rule of this name." in section
    assert "north (unchanged)" in page and "(changed)" in page
    # Same version twice: no differences.
    same = client.get("/console/policies/readmission/diff?from=2&to=2")
    assert "no differences" in same.text
    assert client.get("/console/policies/readmission/diff?from=1&to=9").status_code == 404


def test_compare_chart_levels_match_the_rules() -> None:
    from service.console.rule_view import compare_chart

    a = Rule.model_validate(
        {"steps": [{"from": 0.2, "probability": 0.5}, {"from": 0.4, "probability": 1.0}]}
    )
    b = Rule.model_validate({"steps": [{"from": 0.3, "probability": 1.0}]})
    chart = compare_chart(a, b, (0.0, 1.0))
    assert chart.before == rule_chart(a, (0.0, 1.0))
    assert chart.after == rule_chart(b, (0.0, 1.0))
    assert [t.label for t in chart.x_ticks] == ["0", "0.2", "0.3", "0.4", "1"]
    with pytest.raises(ValueError):
        compare_chart(None, None, (0.0, 1.0))
