"""After sign-in, back to the page asked for, and only to a console page (SQLite and
PostgreSQL): a signed-out request is redirected to ``/console/sign-in?next=…``, the sign-in
form carries ``next`` and a good sign-in lands there; any other target (another host, a
scheme-relative ``//`` path, a path outside the console, the sign-in page itself) lands on
the policy list instead, so the console is no open redirect."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient

from tests.test_console import csrf_of


def _next_field(html: str) -> str | None:
    marker = 'name="next" value="'
    start = html.find(marker)
    if start < 0:
        return None
    start += len(marker)
    return html[start : html.index('"', start)]


def test_a_signed_out_request_comes_back_after_sign_in(
    client: TestClient, tokens: dict[str, str]
) -> None:
    wanted = "/console/policies/readmission/diff?from=1&to=2"
    r = client.get(wanted, follow_redirects=False)
    assert r.status_code == 303
    assert (
        r.headers["location"]
        == "/console/sign-in?next=/console/policies/readmission/diff%3Ffrom%3D1%26to%3D2"
    )
    page = client.get(r.headers["location"])
    assert _next_field(page.text) == "/console/policies/readmission/diff?from=1&amp;to=2"
    r = client.post(
        "/console/sign-in",
        data={"csrf": csrf_of(page.text), "api_key": tokens["admin"], "next": wanted},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == wanted


def test_a_refused_sign_in_keeps_the_page_to_return_to(client: TestClient) -> None:
    page = client.get("/console/sign-in?next=/console/log")
    r = client.post(
        "/console/sign-in",
        data={"csrf": csrf_of(page.text), "api_key": "ehk_wrong", "next": "/console/log"},
    )
    assert r.status_code == 401
    assert _next_field(r.text) == "/console/log"


def test_a_post_without_a_session_goes_to_the_plain_sign_in_page(client: TestClient) -> None:
    r = client.post("/console/log/verify", data={"csrf": "x"}, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/console/sign-in"


@pytest.mark.parametrize(
    "target",
    [
        "https://elsewhere.example/console/policies",
        "//elsewhere.example/console/policies",
        "/console//elsewhere.example",
        "/console/\\elsewhere.example",
        "/v1/policies",
        "/console/sign-in",
        "/console/policies\r\nSet-Cookie: x=1",
        "",
    ],
)
def test_only_a_console_page_is_a_target(
    client: TestClient, tokens: dict[str, str], target: str
) -> None:
    page = client.get("/console/sign-in", params={"next": target})
    assert _next_field(page.text) is None
    r = client.post(
        "/console/sign-in",
        data={"csrf": csrf_of(page.text), "api_key": tokens["admin"], "next": target},
        follow_redirects=False,
    )
    assert r.status_code == 303 and r.headers["location"] == "/console/policies"
