"""Decision look-up: ``GET /v1/recommendations/{id}`` (audit role) and the console's page,
on SQLite and PostgreSQL."""

from __future__ import annotations

import json
from collections.abc import Callable
from datetime import UTC, datetime

from fastapi.testclient import TestClient

from tests.helpers import bearer, make_request
from tests.test_console import sign_in


def _decide(client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]) -> dict:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    body = make_request(score=0.75, attributes={"region": "south"})
    r = client.post("/v1/recommendations", json=body, headers=bearer(tokens["scoring"]))
    assert r.status_code == 201, r.text
    return {"body": body, "text": r.text, "json": r.json()}


def test_the_stored_decision_is_the_response_first_sent(
    client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]
) -> None:
    sent = _decide(client, tokens, make_key)
    rid = sent["json"]["recommendation_id"]
    r = client.get(f"/v1/recommendations/{rid}", headers=bearer(tokens["audit"]))
    assert r.status_code == 200, r.text
    got = r.json()
    # Field for field and value for value what the scoring call answered.
    assert got["recommendation"] == json.loads(sent["text"])
    assert got["score"] == 0.75 and got["attributes"] == {"region": "south"}
    assert got["shadow"] is None and got["outcome"] is None and got["final"] is None
    # The record id leads to the log's inclusion proof of this decision (once sealed).
    assert isinstance(got["record_id"], int) and got["record_id"] >= 1
    # The id is matched in any letter case (it is a UUID).
    upper = client.get(f"/v1/recommendations/{rid.upper()}", headers=bearer(tokens["audit"]))
    assert upper.json() == got


def test_outcome_corrections_and_final_decision_are_shown(
    client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]
) -> None:
    sent = _decide(client, tokens, make_key)
    rid = sent["json"]["recommendation_id"]
    scoring = bearer(tokens["scoring"])
    now = datetime.now(UTC).isoformat()
    first = {"recommendation_id": rid, "outcome": 1, "source": "records", "observed_at": now}
    assert client.post("/v1/outcomes", json=first, headers=scoring).status_code == 201
    fix = {**first, "outcome": 0, "correction": {"reason": "entered on the wrong case"}}
    assert client.post("/v1/outcomes", json=fix, headers=scoring).status_code == 201
    final = {"decision": "overridden", "reason_code": "clinical", "decided_at": now}
    r = client.post(f"/v1/recommendations/{rid}/final", json=final, headers=scoring)
    assert r.status_code == 201, r.text
    got = client.get(f"/v1/recommendations/{rid}", headers=bearer(tokens["audit"])).json()
    assert got["outcome"]["outcome"] == 0 and got["outcome"]["corrections"] == 1
    assert got["outcome"]["source"] == "records" and got["outcome"]["recorded_by"] == "scorer"
    assert got["final"]["decision"] == "overridden" and got["final"]["reason_code"] == "clinical"
    assert got["final"]["final_action"] is (not sent["json"]["action"])


def test_unknown_ids_are_404_in_the_one_error_shape(
    client: TestClient, tokens: dict[str, str]
) -> None:
    audit = bearer(tokens["audit"])
    for rid in ("00000000-0000-4000-8000-000000000000", "not-a-uuid", "batch"):
        r = client.get(f"/v1/recommendations/{rid}", headers=audit)
        assert r.status_code == 404, r.text
        assert r.json()["error"]["code"] == "unknown_recommendation"
    r = client.get(f"/v1/recommendations/{'a' * 200}", headers=audit)
    assert r.status_code == 422 and "error" in r.json()


def test_the_console_page_looks_a_decision_up(
    client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]
) -> None:
    sent = _decide(client, tokens, make_key)
    rid = sent["json"]["recommendation_id"]
    sign_in(client, tokens["admin"])
    assert client.get("/console/decisions").status_code == 403  # admins read no decisions
    sign_in(client, tokens["audit"])
    empty = client.get("/console/decisions")
    assert empty.status_code == 200 and 'name="id"' in empty.text
    page = client.get("/console/decisions", params={"id": rid})
    assert page.status_code == 200
    for value in (rid, sent["body"]["case_id"], sent["json"]["group"], "region = south"):
        assert value in page.text
    assert f"{sent['json']['probability']}" in page.text and "not reported yet" in page.text
    assert "style=" not in page.text and "<script" not in page.text
    missing = client.get("/console/decisions", params={"id": "no-such-decision"})
    assert missing.status_code == 404 and "no recommendation has the id" in missing.text
