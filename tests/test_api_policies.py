"""Policy lifecycle over HTTP: four-eyes, one active version, rollback, shadow, history, diff."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, text
from sqlalchemy.exc import DBAPIError, IntegrityError

from tests.helpers import bearer, make_policy
from tests.insert_only import changes_allowed

P = "/v1/policies/readmission"


def _statuses(client: TestClient, token: str) -> dict[int, str]:
    r = client.get(f"{P}/versions", headers=bearer(token))
    assert r.status_code == 200
    return {v["version"]: v["status"] for v in r.json()}


def test_submit_numbers_versions_and_records_content_hash(
    client: TestClient, tokens: dict[str, str]
) -> None:
    doc = make_policy()
    r1 = client.post(f"{P}/versions", json=doc, headers=bearer(tokens["admin"]))
    r2 = client.post(f"{P}/versions", json=doc, headers=bearer(tokens["admin"]))
    assert (r1.status_code, r2.status_code) == (201, 201)
    assert (r1.json()["version"], r2.json()["version"]) == (1, 2)
    assert r1.json()["status"] == "draft"
    # The content hash is SHA-256 over compact, key-sorted JSON of the document (recomputed
    # here with the standard library, independently of the service's helper).
    stored = client.get(f"{P}/versions/1", headers=bearer(tokens["admin"])).json()
    canonical = json.dumps(stored["document"], sort_keys=True, separators=(",", ":"))
    assert stored["content_hash"] == hashlib.sha256(canonical.encode()).hexdigest()
    assert stored["document"]["rules"] == doc["rules"]


def test_author_cannot_approve_own_draft(client: TestClient, tokens: dict[str, str]) -> None:
    client.post(f"{P}/versions", json=make_policy(), headers=bearer(tokens["admin"]))
    r = client.post(f"{P}/versions/1/approve", headers=bearer(tokens["admin"]))
    assert r.status_code == 403
    assert r.json()["error"]["code"] == "four_eyes"
    # Whatever name the request gives, the credential is what counts: the route reads none.
    own = bearer(tokens["admin"])
    for r in (
        client.post(f"{P}/versions/1/approve", json={"actor": "admin-approver"}, headers=own),
        client.post(f"{P}/versions/1/approve", params={"actor": "admin-approver"}, headers=own),
        client.post(f"{P}/versions/1/approve", headers={**own, "X-Actor": "admin-approver"}),
    ):
        assert r.status_code == 403 and r.json()["error"]["code"] == "four_eyes", r.text
    assert _statuses(client, tokens["admin"]) == {1: "draft"}
    r = client.post(f"{P}/versions/1/approve", headers=bearer(tokens["admin2"]))
    assert r.status_code == 200
    assert r.json()["approver"] == "admin-approver"
    r = client.post(f"{P}/versions/1/approve", headers=bearer(tokens["admin2"]))
    assert r.status_code == 409  # already approved
    events = client.get(f"{P}/history", headers=bearer(tokens["admin"])).json()
    assert [(e["action"], e["actor"]) for e in events] == [
        ("submit", "admin-author"),
        ("approve", "admin-approver"),
    ]
    assert events[0]["actor_key_id"] != events[1]["actor_key_id"]


def test_only_approved_versions_activate_and_previous_retires(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    first = {"version": 1, "expected_current": None}
    client.post(f"{P}/versions", json=make_policy(), headers=bearer(tokens["admin"]))
    r = client.post(f"{P}/activate", json=first, headers=bearer(tokens["admin"]))
    assert r.status_code == 409 and r.json()["error"]["code"] == "invalid_transition"
    client.post(f"{P}/versions/1/approve", headers=bearer(tokens["admin2"]))
    r = client.post(f"{P}/activate", json=first, headers=bearer(tokens["admin"]))
    assert r.status_code == 200 and r.json()["status"] == "active"
    assert r.json()["approver"] == "admin-approver"
    v2 = publish()
    assert v2 == 2
    assert _statuses(client, tokens["admin"]) == {1: "retired", 2: "active"}


INSERT_ONLY = {
    "policy_versions": "author = 'someone-else'",
    "policy_events": "actor = 'someone-else'",
    "api_keys": "role = 'admin'",
    "key_events": "reason = 'edited'",
}


def test_postgresql_refuses_updates_and_deletes_of_the_insert_only_tables(
    engine: Engine, publish: Callable[..., int], tokens: dict[str, str]
) -> None:
    """Through the service's own engine and connections: every UPDATE and DELETE of a
    policy version, lifecycle event, key or key event fails (migration 0050's trigger)."""
    if engine.dialect.name != "postgresql":
        pytest.skip("the insert-only triggers are PostgreSQL's")
    publish()
    for table, change in INSERT_ONLY.items():
        for statement in (f"UPDATE {table} SET {change}", f"DELETE FROM {table}"):
            with (
                changes_allowed(),  # past the suite's own check, to the database's
                pytest.raises(DBAPIError, match="insert-only"),
                engine.begin() as conn,
            ):
                conn.execute(text(statement))
    with engine.connect() as conn:  # nothing moved
        assert conn.scalar(text("SELECT count(*) FROM policy_events")) == 3
        assert conn.scalar(text("SELECT count(*) FROM key_events WHERE action = 'revoke'")) == 0


def test_one_active_version_per_policy_by_construction(
    engine: Engine, publish: Callable[..., int]
) -> None:
    """The active version is the policy's one state row's: a second row is refused."""
    publish()
    publish(activate=False)
    with pytest.raises(IntegrityError), engine.begin() as conn:
        conn.execute(
            text("INSERT INTO policy_state (name, active_version) VALUES ('readmission', 2)")
        )


def test_rollback_needs_reason_and_returns_to_previous(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    publish()
    publish()
    admin = bearer(tokens["admin"])
    r = client.post(f"{P}/rollback", json={"reason": "", "expected_current": 3}, headers=admin)
    assert r.status_code == 422
    r = client.post(f"{P}/rollback", json={"expected_current": 3}, headers=admin)
    assert r.status_code == 422
    assert _statuses(client, tokens["admin"]) == {1: "retired", 2: "retired", 3: "active"}

    body = {"reason": "v3 flags too many", "expected_current": 3}
    r = client.post(f"{P}/rollback", json=body, headers=admin)
    assert r.status_code == 200 and r.json()["version"] == 2
    body = {"to_version": 1, "reason": "back to the start", "expected_current": 2}
    r = client.post(f"{P}/rollback", json=body, headers=admin)
    assert r.status_code == 200 and r.json()["version"] == 1
    assert _statuses(client, tokens["admin"]) == {1: "active", 2: "retired", 3: "retired"}

    events = client.get(f"{P}/history", headers=admin).json()
    switches = [
        (e["action"], e["from_version"], e["to_version"], e["reason"])
        for e in events
        if e["action"] in ("activate", "rollback")
    ]
    assert switches == [
        ("activate", None, 1, None),
        ("activate", 1, 2, None),
        ("activate", 2, 3, None),
        ("rollback", 3, 2, "v3 flags too many"),
        ("rollback", 2, 1, "back to the start"),
    ]
    assert {e["actor"] for e in events if e["action"] == "approve"} == {"admin-approver"}


def test_rollback_refuses_drafts_and_first_version(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    admin = bearer(tokens["admin"])
    publish()
    r = client.post(
        f"{P}/rollback", json={"reason": "why not", "expected_current": 1}, headers=admin
    )
    assert r.status_code == 409 and r.json()["error"]["code"] == "nothing_to_roll_back_to"
    client.post(f"{P}/versions", json=make_policy(), headers=admin)
    body = {"to_version": 2, "reason": "x", "expected_current": 1}
    r = client.post(f"{P}/rollback", json=body, headers=admin)
    assert r.status_code == 409
    assert _statuses(client, tokens["admin"]) == {1: "active", 2: "draft"}


def test_submit_refuses_invalid_documents(client: TestClient, tokens: dict[str, str]) -> None:
    admin = bearer(tokens["admin"])
    bad_rule = make_policy(
        rules={
            "north": {
                "steps": [{"from": 0.5, "probability": 1.0}, {"from": 0.6, "probability": 0.2}]
            },
            "south": {"steps": [{"from": 0.2, "probability": 1.0}]},
        }
    )
    r = client.post(f"{P}/versions", json=bad_rule, headers=admin)
    assert r.status_code == 422
    assert "rules" in (r.json()["error"]["field"] or "")
    r = client.post("/v1/policies/other/versions", json=make_policy(), headers=admin)
    assert r.status_code == 422 and r.json()["error"]["code"] == "name_mismatch"
    # A version that makes promises must say how far realized rates may stray.
    targets = {"criterion": "equal-opportunity", "groups": {}}
    for tolerance in (None, 0.0, 0.6):
        doc = make_policy(targets={**targets, "tolerance": tolerance})
        r = client.post(f"{P}/versions", json=doc, headers=admin)
        assert r.status_code == 422, tolerance
        assert r.json()["error"]["code"] == "tolerance_required"
        assert r.json()["error"]["field"] == "targets.tolerance"
    assert client.get(f"{P}/versions", headers=admin).status_code == 404
    doc = make_policy(targets={**targets, "tolerance": 0.05})
    assert client.post(f"{P}/versions", json=doc, headers=admin).status_code == 201


def test_diff_reads_rule_by_rule(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    doc2 = make_policy(
        rules={
            "north": {"steps": [{"from": 0.35, "probability": 1.0}]},
            "south": {
                "steps": [{"from": 0.2, "probability": 0.5}, {"from": 0.4, "probability": 1.0}]
            },
        },
        action_label="offer a nurse visit",
    )
    publish(doc2)
    r = client.get(f"{P}/diff", params={"from": 1, "to": 2}, headers=bearer(tokens["admin"]))
    assert r.status_code == 200
    body = r.json()
    sections = {c["section"] for c in body["changes"]}
    assert sections == {"rules['north']", "action_label"}
    north = next(c for c in body["changes"] if c["section"] == "rules['north']")
    assert "score >= 0.3" in north["before"] and "score >= 0.35" in north["after"]
    assert "offer a nurse visit" in body["summary"]
    same = client.get(f"{P}/diff", params={"from": 1, "to": 1}, headers=bearer(tokens["admin"]))
    assert same.json()["changes"] == [] and same.json()["summary"] == "no differences"
    missing = client.get(f"{P}/diff", params={"from": 1, "to": 9}, headers=bearer(tokens["admin"]))
    assert missing.status_code == 404


def test_shadow_designation(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    admin = bearer(tokens["admin"])
    publish()
    none = {"expected_current": None}
    r = client.put(f"{P}/shadow", json={"version": 1, **none}, headers=admin)
    assert r.status_code == 409  # the active version cannot be its own shadow
    v2 = publish(activate=False)
    r = client.put(f"{P}/shadow", json={"version": v2, **none}, headers=admin)
    assert r.status_code == 200 and r.json()["version"] == v2
    assert r.json()["designated_by"] == "admin-author"
    assert client.get(f"{P}/shadow", headers=admin).json() == r.json()
    listed = client.get("/v1/policies", headers=admin).json()
    assert listed == [
        {"name": "readmission", "latest_version": 2, "active_version": 1, "shadow_version": 2}
    ]
    # Activating the shadow version ends its shadow designation.
    client.post(f"{P}/activate", json={"version": v2, "expected_current": 1}, headers=admin)
    assert client.get(f"{P}/shadow", headers=admin).status_code == 404
    v3 = publish(activate=False)
    client.put(f"{P}/shadow", json={"version": v3, **none}, headers=admin)
    end = {"expected_current": v3}
    assert client.delete(f"{P}/shadow", params=end, headers=admin).status_code == 204
    assert client.delete(f"{P}/shadow", params=end, headers=admin).status_code == 204  # repeat
    assert client.delete(f"{P}/shadow", headers=admin).status_code == 422  # required
    actions = [e["action"] for e in client.get(f"{P}/history", headers=admin).json()]
    assert actions.count("shadow") == 2 and actions.count("unshadow") == 2
