"""Client mistakes that used to reach the database or be misread: each is now a 4xx in the
one error shape, with the field and the reason, and nothing is written.

Each case here returned 500 (an OverflowError, a DataError for U+0000 on PostgreSQL) or was
accepted (an outcome dated 2099, 200,000 attributes) before the edge checked it.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta
from typing import Any
from urllib.parse import quote

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import event
from sqlalchemy.orm import Session, sessionmaker

from service.app import create_app
from service.settings import Settings
from tests.helpers import bearer, count_rows, make_policy, make_request

R = "/v1/recommendations"


def _refused(
    r: Any, field: str | None, status: int = 422, code: str | None = None
) -> dict[str, Any]:
    assert r.status_code == status, r.text
    err: dict[str, Any] = r.json()["error"]
    assert set(err) == {"code", "message", "field", "details"}
    assert err["message"]
    if field is not None:
        assert err["field"] == field, err
    if code is not None:
        assert err["code"] == code, err
    return err


@pytest.fixture
def live(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> Iterator[dict[str, dict[str, str]]]:
    """The test policy published and active; headers per role."""
    publish()
    yield {role: bearer(token) for role, token in tokens.items()}


BIG = [10**30, 2**31, 2**63]


@pytest.mark.parametrize("number", BIG)
def test_integers_beyond_the_columns(
    client: TestClient, live: dict[str, dict[str, str]], number: int
) -> None:
    admin, audit = live["admin"], live["audit"]
    p = "/v1/policies/readmission"
    _refused(client.get(f"{p}/versions/{number}", headers=admin), "version")
    _refused(client.post(f"{p}/versions/{number}/approve", headers=admin), "version")
    body = {"version": number, "expected_current": None}
    _refused(client.post(f"{p}/activate", json=body, headers=admin), "version")
    body = {"to_version": number, "reason": "r", "expected_current": 1}
    _refused(client.post(f"{p}/rollback", json=body, headers=admin), "to_version")
    body = {"version": number, "expected_current": None}
    _refused(client.put(f"{p}/shadow", json=body, headers=admin), "version")
    body = {"version": 2, "expected_current": number}
    _refused(client.put(f"{p}/shadow", json=body, headers=admin), "expected_current")
    params = {"from": number, "to": 1}
    _refused(client.get(f"{p}/diff", params=params, headers=admin), "from")
    params = {"snapshot": number}
    _refused(client.get("/v1/reports/readmission/2026-01", params=params, headers=audit), None)
    body = {"policy": "readmission", "month": "2026-01", "min_count": number}
    _refused(client.post("/v1/audits", json=body, headers=audit), "min_count")


NUL = "a\x00b"
US = "a\x1fb"  # the last C0 control character


def _text_cases(rid: str) -> list[tuple[str, str, str, dict[str, Any], str]]:
    """(role, method, path, request keywords, field) for every kind of text input."""
    final = {"decision": "followed", "decided_at": datetime.now(UTC).isoformat()}
    outcome = {"recommendation_id": rid, "outcome": 1, "source": "records"}
    outcome["observed_at"] = datetime.now(UTC).isoformat()
    cases: list[tuple[str, str, str, dict[str, Any], str]] = []
    for bad in (NUL, US):
        cases += [
            ("scoring", "POST", R, {"json": make_request(request_id=bad)}, "request_id"),
            ("scoring", "POST", R, {"json": make_request(case_id=bad)}, "case_id"),
            (
                "scoring",
                "POST",
                R,
                {"json": make_request(attributes={"region": bad})},
                "attributes.region",
            ),
            (
                "scoring",
                "POST",
                f"{R}/batch",
                {"json": {"items": [make_request(case_id=bad)]}},
                "items.0.case_id",
            ),
            ("scoring", "POST", "/v1/outcomes", {"json": {**outcome, "source": bad}}, "source"),
            (
                "scoring",
                "POST",
                "/v1/outcomes",
                {"json": {**outcome, "recommendation_id": bad}},
                "recommendation_id",
            ),
            (
                "scoring",
                "POST",
                f"{R}/{quote(bad)}/final",
                {"json": final},
                "recommendation_id",
            ),
            (
                "scoring",
                "POST",
                f"{R}/{rid}/final",
                {"json": {**final, "decided_by": bad}},
                "decided_by",
            ),
            (
                "admin",
                "POST",
                "/v1/policies/readmission/rollback",
                {"json": {"reason": bad, "expected_current": 1}},
                "reason",
            ),
            (
                "admin",
                "POST",
                "/v1/policies/readmission/activate",
                {"json": {"version": 1, "reason": bad, "expected_current": 1}},
                "reason",
            ),
            (
                "admin",
                "POST",
                "/v1/policies/readmission/versions",
                {"json": make_policy(description=bad)},
                "description",
            ),
            (
                "admin",
                "POST",
                "/v1/policies/readmission/versions",
                {"json": make_policy(action_label=bad)},
                "action_label",
            ),
            (
                "audit",
                "POST",
                "/v1/audits",
                {"json": {"policy": "readmission", "month": "2026-01", "reference_group": bad}},
                "reference_group",
            ),
            ("audit", "GET", f"/v1/reports/{quote(bad)}", {}, "policy"),
            (
                "audit",
                "GET",
                f"/v1/warnings/{quote(bad)}",
                {"params": {"day": "2026-01-01"}},
                "policy",
            ),
        ]
    return cases


def test_control_characters_never_reach_the_database(
    client: TestClient,
    live: dict[str, dict[str, str]],
    session_factory: sessionmaker[Session],
) -> None:
    r = client.post(R, json=make_request(), headers=live["scoring"])
    rid = r.json()["recommendation_id"]
    for role, method, path, kwargs, field in _text_cases(rid):
        r = client.request(method, path, headers=live[role], **kwargs)
        where = f"{method} {path} {kwargs}"
        err = _refused(r, None)
        assert err["field"] == field, where
        assert "control character" in err["message"] or "policy name" in err["message"], where
    assert count_rows(session_factory, "recommendations") == 1
    assert count_rows(session_factory, "outcome_records") == 0
    assert count_rows(session_factory, "final_decisions") == 0
    assert count_rows(session_factory, "policy_versions") == 1


def test_attribute_bounds(
    client: TestClient, live: dict[str, dict[str, str]], session_factory: sessionmaker[Session]
) -> None:
    h = live["scoring"]
    many = {"region": "north", **{f"a{i}": "x" for i in range(32)}}  # 33
    err = _refused(client.post(R, json=make_request(attributes=many), headers=h), "attributes")
    assert "at most 32" in err["message"]
    huge = {f"a{i}": "x" for i in range(200_000)}
    err = _refused(client.post(R, json=make_request(attributes=huge), headers=h), "attributes")
    assert err["details"][0]["code"] == "too_many_attributes"
    name = "n" * 65
    body = make_request(attributes={"region": "north", name: "x"})
    _refused(client.post(R, json=body, headers=h), f"attributes.{name}.[key]")
    body = make_request(attributes={"region": "north", "extra": "v" * 65})
    err = _refused(client.post(R, json=body, headers=h), "attributes.extra")
    assert "longer than 64" in err["message"]
    # 31 more attributes than the policy needs is still fine, and only its own is stored.
    extra = {f"a{i}": "x" for i in range(31)}
    body = make_request(attributes={"region": " north ", **extra})
    r = client.post(R, json=body, headers=h)
    assert r.status_code == 201 and r.json()["group"] == "north"
    assert count_rows(session_factory, "recommendations") == 1


@pytest.mark.parametrize("value", [True, False, 1, 1.0, None, ["north"], {"x": "y"}])
def test_attribute_values_are_strings(
    client: TestClient, live: dict[str, dict[str, str]], value: Any
) -> None:
    body = make_request(attributes={"region": "north", "flag": value})
    err = _refused(client.post(R, json=body, headers=live["scoring"]), "attributes.flag")
    assert "attribute values are strings" in err["message"]
    assert err["details"][0]["code"] == "invalid_attribute"


def _outcome(rid: str, when: datetime, **extra: Any) -> dict[str, Any]:
    body = {"recommendation_id": rid, "outcome": 1, "source": "records", **extra}
    return {**body, "observed_at": when.isoformat()}


def test_outcomes_and_decisions_must_follow_the_recommendation(
    client: TestClient, live: dict[str, dict[str, str]], session_factory: sessionmaker[Session]
) -> None:
    h = live["scoring"]
    rid = client.post(R, json=make_request(), headers=h).json()["recommendation_id"]
    now = datetime.now(UTC)
    for when, code in [
        (datetime(2020, 1, 1, tzinfo=UTC), "before_recommendation"),
        (datetime(2099, 1, 1, tzinfo=UTC), "in_the_future"),
        (now - timedelta(minutes=6), "before_recommendation"),
        (now + timedelta(minutes=6), "in_the_future"),
    ]:
        r = client.post("/v1/outcomes", json=_outcome(rid, when), headers=h)
        _refused(r, "observed_at", code=code)
        body = {"decision": "followed", "decided_at": when.isoformat()}
        r = client.post(f"{R}/{rid}/final", json=body, headers=h)
        _refused(r, "decided_at", code=code)
    # A date Python cannot move to UTC is a 422, not an OverflowError.
    body = {**_outcome(rid, now), "observed_at": "0001-01-01T00:00:00+01:00"}
    _refused(client.post("/v1/outcomes", json=body, headers=h), "observed_at")
    assert count_rows(session_factory, "outcome_records") == 0
    # Within the allowed clock difference (300 s by default) on either side: accepted.
    r = client.post("/v1/outcomes", json=_outcome(rid, now - timedelta(seconds=60)), headers=h)
    assert r.status_code == 201, r.text
    body = {"decision": "followed", "decided_at": (now + timedelta(seconds=60)).isoformat()}
    assert client.post(f"{R}/{rid}/final", json=body, headers=h).status_code == 201


def test_clock_skew_is_a_setting(
    settings: Settings, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    strict = settings.model_copy(update={"clock_skew_seconds": 0.0})
    with TestClient(create_app(strict)) as c:
        h = bearer(tokens["scoring"])
        rid = c.post(R, json=make_request(), headers=h).json()["recommendation_id"]
        early = datetime.now(UTC) - timedelta(seconds=2)
        r = c.post("/v1/outcomes", json=_outcome(rid, early), headers=h)
        _refused(r, "observed_at", code="before_recommendation")
        assert "allowing 0 s" in r.json()["error"]["message"]


@pytest.mark.parametrize("month", ["0000-01", "9999-12", "1899-12"])
def test_months_outside_the_calendar(
    client: TestClient, live: dict[str, dict[str, str]], month: str
) -> None:
    audit = live["audit"]
    _refused(client.get(f"/v1/reports/readmission/{month}", headers=audit), "month")
    _refused(client.get(f"/v1/reports/readmission/{month}.csv", headers=audit), "month")
    body = {"policy": "readmission", "month": month}
    _refused(client.post("/v1/audits", json=body, headers=audit), "month")
    params = {"from": month, "to": "2026-01"}
    _refused(client.get("/v1/reports/readmission/history", params=params, headers=audit), "from")


def test_recommendation_batch_lists_every_bad_item(
    client: TestClient, live: dict[str, dict[str, str]], session_factory: sessionmaker[Session]
) -> None:
    items = [make_request() for _ in range(7)]
    items[1]["score"] = "high"  # the schema refuses it
    items[2]["attributes"] = {"region": "west"}  # the policy refuses it
    items[3]["attributes"] = {"region": True}  # the one reading refuses it
    items[4]["case_id"] = "c\x00"  # a control character
    items[5]["score"] = 1.5  # outside the policy's range
    r = client.post(f"{R}/batch", json={"items": items}, headers=live["scoring"])
    err = _refused(r, "items.1.score", code="invalid_batch")
    assert [(d["field"], d["code"]) for d in err["details"]] == [
        ("items.1.score", "float_type"),
        ("items.2.attributes", "unknown_group"),
        ("items.3.attributes.region", "invalid_attribute"),
        ("items.4.case_id", "string_pattern_mismatch"),
        ("items.5.score", "score_out_of_range"),
    ]
    assert err["message"].startswith("5 of 7 item(s) refused, nothing was written")
    assert count_rows(session_factory, "recommendations") == 0


def test_outcome_batch_lists_every_bad_item(
    client: TestClient, live: dict[str, dict[str, str]], session_factory: sessionmaker[Session]
) -> None:
    h = live["scoring"]
    rids = [
        client.post(R, json=make_request(), headers=h).json()["recommendation_id"] for _ in range(4)
    ]
    now = datetime.now(UTC)
    items = [_outcome(rid, now) for rid in rids] + [_outcome("nope", now)]
    items[1]["outcome"] = 2  # the schema refuses it
    items[2]["observed_at"] = "2099-01-01T00:00:00Z"  # the store refuses it (in the future)
    r = client.post("/v1/outcomes/batch", json={"items": items}, headers=h)
    err = _refused(r, "items.1.outcome", code="invalid_batch")
    assert [(d["field"], d["code"]) for d in err["details"]] == [
        ("items.1.outcome", "literal_error"),
        ("items.2.observed_at", "in_the_future"),
        ("items.4.recommendation_id", "unknown_recommendation"),
    ]
    assert count_rows(session_factory, "outcome_records") == 0
    # A batch of one bad item is still a batch error (one shape for every batch).
    r = client.post("/v1/outcomes/batch", json={"items": items[4:]}, headers=h)
    _refused(r, "items.0.recommendation_id", code="invalid_batch")
    # The envelope itself: not a list, empty, or not JSON.
    _refused(client.post("/v1/outcomes/batch", json={"items": []}, headers=h), "items")
    _refused(client.post("/v1/outcomes/batch", json={"items": 3}, headers=h), "items")
    r = client.post("/v1/outcomes/batch", content=b"{nope", headers=h)
    _refused(r, None, status=400, code="malformed_json")


def test_malformed_tokens_are_refused_without_a_lookup(
    client: TestClient, make_key: Callable[..., str]
) -> None:
    statements: list[str] = []
    engine = client.app.state.engine  # type: ignore[attr-defined]

    def seen(*args: Any) -> None:
        statements.append(str(args[2]))

    event.listen(engine, "before_cursor_execute", seen)
    try:
        valid = make_key("audit")
        for token in [
            "x",
            "eh_short",
            valid[:-1],  # one character short
            valid + "A",
            valid[:-1] + "!",  # a character no token holds
            "eh_" + "\u00e9" * 43,  # sent as Latin-1 bytes, as a header may be
        ]:
            statements.clear()
            header = f"Bearer {token}".encode("latin-1")
            r = client.get("/v1/log/verify", headers={"Authorization": header})  # type: ignore[dict-item]
            _refused(r, None, status=401, code="unauthorized")
            assert statements == [], token
        # A well-formed token that is no key is looked up (and refused).
        statements.clear()
        unknown = "eh_" + "A" * 43
        _refused(client.get("/v1/log/verify", headers=bearer(unknown)), None, status=401)
        assert statements
    finally:
        event.remove(engine, "before_cursor_execute", seen)
