"""The transaction rule, route by route: a write is durable before its response starts, and
a write that cannot be committed is answered with an error and leaves nothing behind.

``CASES`` holds one successful call for every write route (every method but GET in the
OpenAPI document; a new write route without a case fails ``test_every_write_route_has_a_case``).
Each case sets up what the call needs through the API, then the call is made through an ASGI
wrapper that, when the response starts, counts the rows of the table the call writes from a
connection of its own.

The failing half makes every commit fail (the driver's COMMIT is replaced by a rollback and
an error): the call must not answer 2xx, and the table must hold what it held before.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, text

from service.app import create_app
from service.settings import Settings
from tests.audit_helpers import POLICY, audit_policy
from tests.helpers import bearer, make_request

Tokens = dict[str, dict[str, str]]


@dataclass(frozen=True)
class Call:
    method: str
    url: str
    role: str
    json: Any = None
    params: dict[str, Any] | None = None
    ndjson: list[dict[str, Any]] | None = None  # a body of newline-delimited JSON instead


@dataclass(frozen=True)
class Case:
    route: tuple[str, str]
    table: str
    setup: Callable[[TestClient, Tokens], Call]


def _submit(c: TestClient, t: Tokens, version: int, approve: bool = True) -> None:
    doc = audit_policy()
    r = c.post(f"/v1/policies/{POLICY}/versions", json=doc, headers=t["admin"])
    assert r.status_code == 201 and r.json()["version"] == version, r.text
    if approve:
        r = c.post(f"/v1/policies/{POLICY}/versions/{version}/approve", headers=t["admin2"])
        assert r.status_code == 200, r.text


def _activate(c: TestClient, t: Tokens, version: int, current: int | None) -> None:
    body = {"version": version, "expected_current": current}
    r = c.post(f"/v1/policies/{POLICY}/activate", json=body, headers=t["admin"])
    assert r.status_code == 200, r.text


def _live(c: TestClient, t: Tokens) -> None:
    _submit(c, t, 1)
    _activate(c, t, 1, None)


def _scored(c: TestClient, t: Tokens) -> str:
    _live(c, t)
    r = c.post("/v1/recommendations", json=make_request(), headers=t["scoring"])
    assert r.status_code == 201, r.text
    return str(r.json()["recommendation_id"])


def _outcome(recommendation_id: str) -> dict[str, Any]:
    now = datetime.now(UTC).isoformat()
    return {"recommendation_id": recommendation_id, "outcome": 1, "observed_at": now, "source": "t"}


def _submit_case(c: TestClient, t: Tokens) -> Call:
    return Call("POST", f"/v1/policies/{POLICY}/versions", "admin", audit_policy())


def _approve_case(c: TestClient, t: Tokens) -> Call:
    _submit(c, t, 1, approve=False)
    return Call("POST", f"/v1/policies/{POLICY}/versions/1/approve", "admin2")


def _activate_case(c: TestClient, t: Tokens) -> Call:
    _submit(c, t, 1)
    body = {"version": 1, "expected_current": None}
    return Call("POST", f"/v1/policies/{POLICY}/activate", "admin", body)


def _rollback_case(c: TestClient, t: Tokens) -> Call:
    _live(c, t)
    _submit(c, t, 2)
    _activate(c, t, 2, 1)
    body = {"reason": "back", "expected_current": 2}
    return Call("POST", f"/v1/policies/{POLICY}/rollback", "admin", body)


def _set_shadow_case(c: TestClient, t: Tokens) -> Call:
    _live(c, t)
    _submit(c, t, 2)
    body = {"version": 2, "expected_current": None}
    return Call("PUT", f"/v1/policies/{POLICY}/shadow", "admin", body)


def _clear_shadow_case(c: TestClient, t: Tokens) -> Call:
    _live(c, t)
    _submit(c, t, 2)
    body = {"version": 2, "expected_current": None}
    r = c.put(f"/v1/policies/{POLICY}/shadow", json=body, headers=t["admin"])
    assert r.status_code == 200, r.text
    params = {"expected_current": 2}
    return Call("DELETE", f"/v1/policies/{POLICY}/shadow", "admin", params=params)


def _revoke_case(c: TestClient, t: Tokens) -> Call:
    return Call("POST", "/v1/keys/scorer/revoke", "admin", {"reason": "leaving"})


def _audit_case(c: TestClient, t: Tokens) -> Call:
    _scored(c, t)
    month = datetime.now(UTC).strftime("%Y-%m")
    return Call("POST", "/v1/audits", "audit", {"policy": POLICY, "month": month})


def _outcome_case(c: TestClient, t: Tokens) -> Call:
    return Call("POST", "/v1/outcomes", "scoring", _outcome(_scored(c, t)))


def _outcome_batch_case(c: TestClient, t: Tokens) -> Call:
    items = [_outcome(_scored(c, t))]
    return Call("POST", "/v1/outcomes/batch", "scoring", {"items": items})


def _final_case(c: TestClient, t: Tokens) -> Call:
    rid = _scored(c, t)
    body = {"decision": "followed", "decided_at": datetime.now(UTC).isoformat()}
    return Call("POST", f"/v1/recommendations/{rid}/final", "scoring", body)


def _recommend_case(c: TestClient, t: Tokens) -> Call:
    _live(c, t)
    return Call("POST", "/v1/recommendations", "scoring", make_request())


def _recommend_batch_case(c: TestClient, t: Tokens) -> Call:
    _live(c, t)
    items = [make_request(), make_request()]
    return Call("POST", "/v1/recommendations/batch", "scoring", {"items": items})


def _recommend_stream_case(c: TestClient, t: Tokens) -> Call:
    _live(c, t)
    lines = [make_request(), make_request()]
    return Call("POST", "/v1/recommendations/stream", "scoring", ndjson=lines)


_P = "/v1/policies/{name}"
CASES = [
    Case(("POST", f"{_P}/versions"), "policy_versions", _submit_case),
    Case(("POST", f"{_P}/versions/{{version}}/approve"), "policy_events", _approve_case),
    Case(("POST", f"{_P}/activate"), "policy_events", _activate_case),
    Case(("POST", f"{_P}/rollback"), "policy_events", _rollback_case),
    Case(("PUT", f"{_P}/shadow"), "policy_events", _set_shadow_case),
    Case(("DELETE", f"{_P}/shadow"), "policy_events", _clear_shadow_case),
    Case(("POST", "/v1/keys/{name}/revoke"), "key_events", _revoke_case),
    Case(("POST", "/v1/audits"), "audit_snapshots", _audit_case),
    Case(("POST", "/v1/outcomes"), "outcome_records", _outcome_case),
    Case(("POST", "/v1/outcomes/batch"), "outcome_records", _outcome_batch_case),
    Case(("POST", "/v1/recommendations/{recommendation_id}/final"), "final_decisions", _final_case),
    Case(("POST", "/v1/recommendations"), "recommendations", _recommend_case),
    Case(("POST", "/v1/recommendations/batch"), "recommendations", _recommend_batch_case),
    Case(("POST", "/v1/recommendations/stream"), "recommendations", _recommend_stream_case),
]


def _count(engine: Engine, table: str) -> int:
    with engine.connect() as conn:
        return int(conn.execute(text(f"SELECT COUNT(*) FROM {table}")).scalar_one())


def test_every_write_route_has_a_case(client: TestClient) -> None:
    paths = client.get("/openapi.json").json()["paths"]
    writes = {(m.upper(), p) for p, ops in paths.items() for m in ops if m != "get"}
    assert writes == {case.route for case in CASES}


@pytest.fixture
def tokens_by_role(tokens: dict[str, str]) -> Tokens:
    return {role: bearer(token) for role, token in tokens.items()}


@dataclass
class Watch:
    """A client whose responses, when they start, record the row count of ``table``."""

    client: TestClient
    table: str | None = None
    seen: list[int] = field(default_factory=list)


@pytest.fixture
def watch(settings: Settings, engine: Engine) -> Iterator[Watch]:
    app = create_app(settings)

    async def watching(scope: Any, receive: Any, send: Any) -> None:
        async def watched_send(message: Any) -> None:
            if message["type"] == "http.response.start" and w.table is not None:
                w.seen.append(_count(engine, w.table))
            await send(message)

        await app(scope, receive, watched_send)

    with TestClient(watching, raise_server_exceptions=False) as c:  # type: ignore[arg-type]
        w = Watch(c)
        yield w


def _send(c: TestClient, call: Call, t: Tokens) -> Any:
    if call.ndjson is not None:
        body = "".join(json.dumps(line) + "\n" for line in call.ndjson).encode()
        headers = {**t[call.role], "Content-Type": "application/x-ndjson"}
        return c.request(call.method, call.url, headers=headers, content=body)
    return c.request(
        call.method, call.url, headers=t[call.role], json=call.json, params=call.params
    )


@pytest.mark.parametrize("case", CASES, ids=lambda case: " ".join(case.route))
def test_write_is_visible_when_the_response_starts(
    case: Case,
    watch: Watch,
    tokens_by_role: Tokens,
    engine: Engine,
) -> None:
    call = case.setup(watch.client, tokens_by_role)
    before = _count(engine, case.table)
    watch.table = case.table
    r = _send(watch.client, call, tokens_by_role)
    assert 200 <= r.status_code < 300, r.text
    assert watch.seen == [_count(engine, case.table)]
    assert watch.seen[0] > before, f"{case.route}: nothing written by the time the response started"


@pytest.fixture
def failing_commits(engine: Engine, monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """From the moment it is requested, every COMMIT fails as the database would refuse it:
    the driver's transaction is rolled back and an error raised."""
    refused: list[int] = []

    def refuse(_dialect: Any, dbapi_connection: Any) -> None:
        refused.append(1)
        dbapi_connection.rollback()
        raise RuntimeError("forced: the commit fails")

    monkeypatch.setattr(type(engine.dialect), "do_commit", refuse)
    return refused


@pytest.mark.parametrize("case", CASES, ids=lambda case: " ".join(case.route))
def test_an_uncommitted_write_is_an_error_and_leaves_nothing(
    case: Case,
    watch: Watch,
    tokens_by_role: Tokens,
    engine: Engine,
    request: pytest.FixtureRequest,
) -> None:
    call = case.setup(watch.client, tokens_by_role)
    before = _count(engine, case.table)
    refused = request.getfixturevalue("failing_commits")  # from here on, commits fail
    r = _send(watch.client, call, tokens_by_role)
    assert refused, f"{case.route}: the call never tried to commit"
    assert r.status_code >= 500, f"{case.route}: {r.status_code} for a write never committed"
    assert r.json()["error"]["code"] in ("internal_error", "database_unavailable"), r.text
    assert _count(engine, case.table) == before
