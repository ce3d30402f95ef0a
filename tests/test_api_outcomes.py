"""Feedback API: outcomes (idempotent, conflicts, corrections, batches) and final decisions."""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime
from typing import Any

from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.store.audit_models import FinalDecision, OutcomeRecord
from tests.audit_helpers import POLICY, put_live
from tests.helpers import bearer, make_request


def _now() -> str:
    """An observation or decision made now: after its recommendation, not in the future."""
    return datetime.now(UTC).isoformat()


def _score(client: TestClient, headers: dict[str, str], n: int = 3) -> list[dict[str, Any]]:
    items = [
        make_request(case_id=f"c-{i}", score=0.1 + 0.2 * i, attributes={"region": "north"})
        for i in range(n)
    ]
    r = client.post("/v1/recommendations/batch", json={"items": items}, headers=headers)
    assert r.status_code == 201, r.text
    out: list[dict[str, Any]] = r.json()["items"]
    return out


def _count(factory: sessionmaker[Session], model: Any) -> int:
    with factory() as session:
        return session.query(model).count()


def test_outcome_recorded_repeated_conflict_and_correction(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    put_live(client, make_key)
    h = bearer(make_key("scoring"))
    rec = _score(client, h)[0]
    body = {
        "recommendation_id": rec["recommendation_id"],
        "outcome": 1,
        "observed_at": _now(),
        "source": "records",
    }
    r = client.post("/v1/outcomes", json=body, headers=h)
    assert r.status_code == 201 and r.json()["status"] == "recorded"
    r = client.post("/v1/outcomes", json=body, headers=h)
    assert r.status_code == 200 and r.json()["status"] == "unchanged"
    r = client.post("/v1/outcomes", json={**body, "outcome": 0}, headers=h)
    assert r.status_code == 409 and r.json()["error"]["code"] == "outcome_conflict"
    fixed = {**body, "outcome": 0, "correction": {"reason": "coding error in the extract"}}
    r = client.post("/v1/outcomes", json=fixed, headers=h)
    assert r.status_code == 201 and r.json() == {
        "recommendation_id": rec["recommendation_id"],
        "status": "corrected",
        "outcome": 0,
        "corrections": 1,
    }
    with session_factory() as session:
        first, latest = session.query(OutcomeRecord).order_by(OutcomeRecord.id).all()
    # Insert-only: the correction is a new record with its reason; the first one stays.
    assert (first.outcome, first.correction_reason) == (1, None)
    assert (latest.outcome, latest.correction_reason) == (0, "coding error in the extract")
    assert first.recorded_by == latest.recorded_by != ""


def test_outcome_by_policy_and_case_and_unknown(
    client: TestClient, make_key: Callable[..., str]
) -> None:
    put_live(client, make_key)
    h = bearer(make_key("scoring"))
    recs = _score(client, h)
    body = {"policy": POLICY, "case_id": "c-1", "outcome": 0, "observed_at": _now(), "source": "x"}
    r = client.post("/v1/outcomes", json=body, headers=h)
    assert r.status_code == 201 and r.json()["recommendation_id"] == recs[1]["recommendation_id"]
    r = client.post("/v1/outcomes", json={**body, "case_id": "nope"}, headers=h)
    assert r.status_code == 404 and r.json()["error"]["code"] == "unknown_recommendation"
    r = client.post(
        "/v1/outcomes",
        json={**body, "recommendation_id": recs[0]["recommendation_id"]},
        headers=h,
    )
    assert r.status_code == 422  # both ways of naming the recommendation at once
    r = client.post("/v1/outcomes", json={**body, "outcome": 2}, headers=h)
    assert r.status_code == 422
    r = client.post("/v1/outcomes", json={**body, "observed_at": "2026-12-20T10:00:00"}, headers=h)
    assert r.status_code == 422  # a time without a zone is ambiguous


def test_batch_is_all_or_nothing(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    put_live(client, make_key)
    h = bearer(make_key("scoring"))
    recs = _score(client, h, 3)

    def item(i: int, y: int) -> dict[str, Any]:
        rid = recs[i]["recommendation_id"]
        return {"recommendation_id": rid, "outcome": y, "observed_at": _now(), "source": "s"}

    bad = [item(0, 1), {**item(1, 0), "recommendation_id": "missing"}, item(2, 1)]
    r = client.post("/v1/outcomes/batch", json={"items": bad}, headers=h)
    assert r.status_code == 422
    err = r.json()["error"]
    assert err["code"] == "invalid_batch"
    assert [(d["code"], d["field"]) for d in err["details"]] == [
        ("unknown_recommendation", "items.1.recommendation_id")
    ]
    assert _count(session_factory, OutcomeRecord) == 0  # nothing half-written

    good = [item(0, 1), item(1, 0), item(2, 1)]
    r = client.post("/v1/outcomes/batch", json={"items": good}, headers=h)
    assert r.status_code == 201
    assert [x["status"] for x in r.json()["items"]] == ["recorded"] * 3
    r = client.post("/v1/outcomes/batch", json={"items": good}, headers=h)
    assert r.status_code == 200
    assert [x["status"] for x in r.json()["items"]] == ["unchanged"] * 3

    mixed = [item(0, 1), item(1, 1), item(2, 0)]
    r = client.post("/v1/outcomes/batch", json={"items": mixed}, headers=h)
    assert r.status_code == 422
    assert [(d["code"], d["field"]) for d in r.json()["error"]["details"]] == [
        ("outcome_conflict", "items.1.outcome"),
        ("outcome_conflict", "items.2.outcome"),
    ]
    with session_factory() as session:
        assert sorted(o.outcome for o in session.query(OutcomeRecord)) == [0, 1, 1]


def test_final_decision(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    put_live(client, make_key)
    h = bearer(make_key("scoring"))
    rec = _score(client, h)[2]
    url = f"/v1/recommendations/{rec['recommendation_id']}/final"
    body = {"decision": "overridden", "reason_code": "patient-declined", "decided_at": _now()}
    r = client.post(url, json=body, headers=h)
    assert r.status_code == 201, r.text
    assert r.json()["final_action"] is (not rec["action"])
    assert client.post(url, json=body, headers=h).status_code == 200
    r = client.post(url, json={"decision": "followed", "decided_at": _now()}, headers=h)
    assert r.status_code == 409
    r = client.post(url, json={"decision": "overridden", "decided_at": _now()}, headers=h)
    assert r.status_code == 422  # an override needs a reason code
    r = client.post("/v1/recommendations/unknown/final", json=body, headers=h)
    assert r.status_code == 404
    assert _count(session_factory, FinalDecision) == 1


AUDIT_ROUTES = [
    ("POST", "/v1/outcomes", "scoring"),
    ("POST", "/v1/outcomes/batch", "scoring"),
    ("POST", "/v1/recommendations/some-id/final", "scoring"),
    ("POST", "/v1/audits", "audit"),
    ("GET", f"/v1/reports/{POLICY}", "audit"),
    ("GET", f"/v1/reports/{POLICY}/2026-10", "audit"),
    ("GET", f"/v1/reports/{POLICY}/2026-10.csv", "audit"),
    ("GET", f"/v1/reports/{POLICY}/2026-10.html", "audit"),
]


def test_roles(client: TestClient, make_key: Callable[..., str]) -> None:
    put_live(client, make_key)
    tokens = {role: bearer(make_key(role)) for role in ("scoring", "audit", "admin")}
    for method, path, allowed in AUDIT_ROUTES:
        for caller, headers in [*tokens.items(), ("none", {})]:
            r = client.request(method, path, headers=headers, json={} if method == "POST" else None)
            where = f"{method} {path} as {caller}: {r.status_code}"
            if caller == allowed:
                assert r.status_code not in (401, 403), where
            elif caller == "none":
                assert r.status_code == 401 and r.json()["error"]["code"] == "unauthorized", where
            else:
                assert r.status_code == 403 and r.json()["error"]["code"] == "forbidden", where
    audit = tokens["audit"]
    assert client.get(f"/v1/reports/{POLICY}/2026-10", headers=audit).status_code == 404
    # A month without decisions is refused, and no snapshot is stored for it.
    r = client.post("/v1/audits", json={"policy": POLICY, "month": "2026-10"}, headers=audit)
    assert r.status_code == 422 and r.json()["error"]["code"] == "empty_month"
    assert client.get(f"/v1/reports/{POLICY}", headers=audit).json()["months"] == []
    assert client.get(f"/v1/reports/{POLICY}/2026-10.pdf", headers=audit).status_code == 404
