"""Test data for the feedback and audit tests: a three-group policy put live through the API."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from fastapi.testclient import TestClient

from tests.helpers import bearer, make_policy

POLICY = "readmission"


def audit_policy(**overrides: Any) -> dict[str, Any]:
    """Three regions, one of them small; targets for equal opportunity."""
    cut = {"steps": [{"from": 0.3, "probability": 1.0}]}
    doc = make_policy(
        groups={"attributes": ["region"], "known": ["north", "south", "east"]},
        rules={
            "north": cut,
            "south": {
                "steps": [{"from": 0.2, "probability": 0.5}, {"from": 0.4, "probability": 1.0}]
            },
            "east": {"steps": [{"from": 0.25, "probability": 1.0}]},
        },
        targets={
            "criterion": "equal-opportunity",
            "tolerance": 0.1,
            "expected_cost": 0.5,
            "groups": {
                "north": {"action_rate": 0.4, "tpr": 0.7, "fpr": 0.3},
                "south": {"action_rate": 0.4, "tpr": 0.7, "fpr": 0.3},
            },
        },
    )
    doc.update(overrides)
    return doc


def put_live(
    client: TestClient, make_key: Callable[..., str], shadow: dict[str, Any] | None = None
) -> None:
    """Submit, approve (second admin) and activate the policy; optionally a shadow version."""
    author, approver = bearer(make_key("admin")), bearer(make_key("admin"))
    r = client.post(f"/v1/policies/{POLICY}/versions", json=audit_policy(), headers=author)
    assert r.status_code == 201, r.text
    r = client.post(f"/v1/policies/{POLICY}/versions/1/approve", headers=approver)
    assert r.status_code == 200, r.text
    r = client.post(
        f"/v1/policies/{POLICY}/activate",
        json={"version": 1, "reason": "go", "expected_current": None},
        headers=author,
    )
    assert r.status_code == 200, r.text
    if shadow is not None:
        r = client.post(f"/v1/policies/{POLICY}/versions", json=shadow, headers=author)
        assert r.status_code == 201, r.text
        r = client.post(f"/v1/policies/{POLICY}/versions/2/approve", headers=approver)
        assert r.status_code == 200, r.text
        body = {"version": 2, "expected_current": None}
        r = client.put(f"/v1/policies/{POLICY}/shadow", json=body, headers=author)
        assert r.status_code == 200, r.text
