"""Schema-driven fuzzing: requests generated from the OpenAPI document against every route,
with a key of every role, on SQLite and on PostgreSQL.

Schemathesis turns each operation's schema into Hypothesis strategies, valid ("positive") and
invalid ("negative") requests alike. Every answer must be below 500, every error must be the
one documented shape (``ErrorResponse``), every answer must match its documented schema and
status codes. Half of the cases are steered to the stored policy, recommendation and month,
so they reach the store instead of stopping at "unknown policy". Deterministic
(``derandomize``): CI runs the same cases every time.
"""

from __future__ import annotations

import itertools
import json
import math
import time
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import pytest
import schemathesis
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given
from hypothesis import settings as hypothesis_settings
from hypothesis import strategies as st
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    response_schema_conformance,
    status_code_conformance,
)
from sqlalchemy import Engine

from service.api.errors import ErrorResponse
from service.app import create_app
from service.settings import Settings
from service.store.db import create_session_factory
from tests.helpers import bearer, create_key, make_policy, make_request
from tests.test_access import ACCESS, PUBLIC

EXAMPLES_PER_ROUTE = 60
"""Hypothesis examples per operation and backend (valid and invalid requests mixed)."""
MIN_CASES_PER_BACKEND = 1000
CALLERS = ["own", "admin", "own", "scoring", "own", "audit", "own", "none", "own", "admin2"]
"""Whose key each case is sent with, in turn: the route's own role every other case (so
validation and the store are reached), every role and no key at all in between."""
POLICY = "readmission"
_SERIAL = itertools.count()


def _seed(client: TestClient, keys: dict[str, str]) -> dict[str, str]:
    """A live policy, a few decisions, an outcome and a snapshot, for steered cases."""
    admin, admin2 = bearer(keys["admin"]), bearer(keys["admin2"])
    client.post(f"/v1/policies/{POLICY}/versions", json=make_policy(), headers=admin)
    client.post(f"/v1/policies/{POLICY}/versions/1/approve", headers=admin2)
    body = {"version": 1, "expected_current": None}
    client.post(f"/v1/policies/{POLICY}/activate", json=body, headers=admin)
    scoring = bearer(keys["scoring"])
    rids = [
        client.post(
            "/v1/recommendations", json=make_request(case_id="fuzz-case"), headers=scoring
        ).json()["recommendation_id"]
        for _ in range(3)
    ]
    now = datetime.now(UTC)
    outcome = {"recommendation_id": rids[0], "outcome": 1, "source": "records"}
    r = client.post(
        "/v1/outcomes", json={**outcome, "observed_at": now.isoformat()}, headers=scoring
    )
    assert r.status_code == 201, r.text
    month = f"{now:%Y-%m}"
    body = {"policy": POLICY, "month": month, "provisional": True}
    r = client.post("/v1/audits", json=body, headers=bearer(keys["audit"]))
    assert r.status_code == 201, r.text
    return {"recommendation_id": rids[1], "month": month, "case_id": "fuzz-case"}


def _steer(case: Any, known: dict[str, str], suffix: str) -> None:
    """Point a generated case at stored things: the policy, a recommendation, a month."""
    path = case.path_parameters
    for name in ("name", "policy"):
        if name in path:
            path[name] = POLICY
    if "recommendation_id" in path:
        path["recommendation_id"] = known["recommendation_id"]
    if "month_file" in path:
        path["month_file"] = known["month"] + suffix
    query = case.query
    if isinstance(query, dict) and isinstance(query.get("case_id"), str):
        query["case_id"] = known["case_id"]  # the decisions of a stored case
    bodies = case.body.get("items") if isinstance(case.body, dict) else case.body
    for body in [case.body, *(bodies if isinstance(bodies, list) else [])]:
        if not isinstance(body, dict):
            continue
        if "policy" in body:
            body["policy"] = POLICY
        if "name" in body and "score_meaning" in body:
            body["name"] = POLICY  # a policy document: its name must match the path
        if "recommendation_id" in body:
            body["recommendation_id"] = known["recommendation_id"]
        if "case_id" in body and "score" in body:  # a scoring request
            attributes = body.get("attributes")
            body["attributes"] = {**(attributes if isinstance(attributes, dict) else {})}
            body["attributes"]["region"] = "north"
        if isinstance(body.get("request_id"), str):
            # Distinct, so a batch is not refused for repeating one (that is tested elsewhere).
            body["request_id"] = f"{body['request_id'][:100]}-{next(_SERIAL)}"
        score = body.get("score")
        if isinstance(score, float) and math.isfinite(score):
            body["score"] = abs(score) % 1.0  # within the policy's range
        for moment in ("observed_at", "decided_at"):
            if moment in body:
                body[moment] = datetime.now(UTC).isoformat()


def _send(client: TestClient, case: Any, token: str | None) -> Any:
    kwargs = case.as_transport_kwargs(base_url="http://testserver")
    headers = {
        k: v for k, v in (kwargs.get("headers") or {}).items() if k.lower() != "authorization"
    }
    if token is not None:
        headers["Authorization"] = f"Bearer {token}"
    extra: dict[str, Any] = {}
    if "json" in kwargs:
        extra["json"] = kwargs["json"]
    elif kwargs.get("data") is not None:
        extra["content"] = kwargs["data"]
    return client.request(
        kwargs["method"], kwargs["url"], headers=headers, params=kwargs.get("params"), **extra
    )


def _check(case: Any, response: Any) -> None:
    where = f"{case.operation.label}: {response.status_code} {response.text[:300]}"
    assert response.status_code < 500, where
    if response.status_code >= 400:
        assert response.headers["content-type"].startswith("application/json"), where
        ErrorResponse.model_validate_json(response.content)  # the one documented shape
    case.validate_response(
        response,
        checks=[not_a_server_error, status_code_conformance, response_schema_conformance],
    )


@schemathesis.serializer("application/x-ndjson")
def _ndjson_lines(_ctx: Any, value: Any) -> bytes:
    """A streaming body (its schema: an array of its lines) as newline-delimited JSON."""
    lines = value if isinstance(value, list) else [value]
    return "".join(json.dumps(line) + "\n" for line in lines).encode()


@schemathesis.deserializer("application/x-ndjson")
def _ndjson_answers(_ctx: Any, response: Any) -> list[Any]:
    return [json.loads(line) for line in response.content.splitlines() if line.strip()]


@dataclass(frozen=True)
class Tally:
    cases: Counter[str]  # per operation
    callers: dict[str, set[str]]  # roles used per operation
    statuses: Counter[int]


def _fuzz(
    operation: Any,
    client: TestClient,
    keys: dict[str, str],
    known: dict[str, str],
    tally: Tally,
) -> None:
    """Run the generated cases of one operation."""
    own = ACCESS[(operation.method.upper(), operation.path)].split()[0]  # the first role
    strategy = st.one_of(
        operation.as_strategy(GenerationMode.POSITIVE),
        operation.as_strategy(GenerationMode.NEGATIVE),
    )

    @hypothesis_settings(
        max_examples=EXAMPLES_PER_ROUTE,
        derandomize=True,
        database=None,
        deadline=None,
        suppress_health_check=list(HealthCheck),
    )
    @given(
        case=strategy,
        steer=st.booleans(),
        suffix=st.sampled_from(["", ".csv", ".html", ".json"]),
    )
    def run(case: Any, steer: bool, suffix: str) -> None:
        caller = CALLERS[tally.cases[operation.label] % len(CALLERS)]
        role = own if caller == "own" and own != PUBLIC else caller
        if steer:
            _steer(case, known, suffix)
        response = _send(client, case, keys.get(role))
        tally.cases[operation.label] += 1
        tally.callers.setdefault(operation.label, set()).add(role)
        tally.statuses[response.status_code] += 1
        _check(case, response)

    run()


@pytest.fixture
def fuzz_client(settings: Settings, engine: Engine) -> Iterator[TestClient]:
    with TestClient(create_app(settings), raise_server_exceptions=True) as client:
        yield client


def test_schema_fuzzing(fuzz_client: TestClient, engine: Engine) -> None:
    factory = create_session_factory(engine)
    keys = {
        role: create_key(factory, "admin" if role == "admin2" else role, f"fuzz-{role}")
        for role in ("admin", "admin2", "scoring", "audit")
    }
    known = _seed(fuzz_client, keys)
    schema = schemathesis.openapi.from_dict(fuzz_client.get("/openapi.json").json())
    tally = Tally(Counter(), {}, Counter())
    started = time.monotonic()
    for result in schema.get_all_operations():
        _fuzz(result.ok(), fuzz_client, keys, known, tally)
    elapsed = time.monotonic() - started
    cases, statuses = tally.cases, tally.statuses
    total = sum(cases.values())
    print(
        f"\nschema fuzzing on {engine.dialect.name}: {total} cases over {len(cases)} routes "
        f"in {elapsed:.1f} s; statuses {dict(sorted(statuses.items()))}"
    )
    assert set(cases) == {f"{m} {p}" for m, p in ACCESS}  # every route
    assert total >= MIN_CASES_PER_BACKEND
    for label, seen in tally.callers.items():  # every role, and no key, on every route
        assert {"admin", "scoring", "audit", "none"} <= seen, (label, seen)
