"""Every route on a database that cannot be reached: 503 ``database_unavailable``.

The app is pointed at a PostgreSQL port where nothing listens (connections are refused at
once). Every route of the OpenAPI document is called with a valid body by a caller of its
role whose key the app has just checked (so the route itself runs, not only the key check):
each answers 503 with ``Retry-After`` and the code ``database_unavailable``, except
``/healthz``, which says the process is alive. A caller whose key must be looked up gets the
same 503.
"""

from __future__ import annotations

import json
import socket
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.deps import Caller
from service.app import create_app
from service.settings import Settings
from service.store import keys
from tests.helpers import TEST_SECRET, bearer, make_policy, make_request
from tests.test_access import ACCESS, PUBLIC, _url

AT = "2026-11-02T09:00:00Z"
BODIES: dict[tuple[str, str], Any] = {
    ("POST", "/v1/recommendations"): make_request(),
    ("POST", "/v1/recommendations/batch"): {"items": [make_request()]},
    ("POST", "/v1/policies/{name}/versions"): make_policy(),
    ("POST", "/v1/policies/{name}/activate"): {"version": 1, "expected_current": None},
    ("POST", "/v1/policies/{name}/rollback"): {"reason": "test", "expected_current": 1},
    ("PUT", "/v1/policies/{name}/shadow"): {"version": 1, "expected_current": None},
    ("POST", "/v1/keys/{name}/revoke"): {"reason": "test"},
    ("POST", "/v1/audits"): {"policy": "readmission", "month": "2026-10"},
    ("POST", "/v1/outcomes"): {
        "recommendation_id": "00000000-0000-4000-8000-000000000000",
        "outcome": 1,
        "observed_at": AT,
        "source": "test",
    },
    ("POST", "/v1/outcomes/batch"): {
        "items": [
            {
                "policy": "readmission",
                "case_id": "c-1",
                "outcome": 0,
                "observed_at": AT,
                "source": "test",
            }
        ]
    },
    ("POST", "/v1/recommendations/{recommendation_id}/final"): {
        "decision": "followed",
        "decided_at": AT,
    },
}
NDJSON: dict[tuple[str, str], bytes] = {
    ("POST", "/v1/recommendations/stream"): json.dumps(make_request()).encode() + b"\n",
}
PARAMS: dict[tuple[str, str], dict[str, str]] = {
    ("GET", "/v1/policies/{name}/diff"): {"from": "1", "to": "2"},
    ("DELETE", "/v1/policies/{name}/shadow"): {"expected_current": "1"},
    ("GET", "/v1/reports/{policy}/history"): {"from": "2026-01", "to": "2026-10"},
    ("GET", "/v1/warnings/{policy}"): {"day": "2026-10-02"},
    ("GET", "/v1/recommendations"): {"case_id": "c-1"},
}


def _refused_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])  # closed again: connections are refused


@pytest.fixture
def unreachable() -> Iterator[tuple[TestClient, dict[str, str]]]:
    url = f"postgresql+psycopg://postgres@127.0.0.1:{_refused_port()}/nowhere"
    app = create_app(Settings(database_url=url, draw_secret=TEST_SECRET))  # type: ignore[arg-type]
    # Tokens of the issued shape ("eh_" and 43 characters), cached as valid keys.
    tokens = {
        role: "eh_" + c * 43 for role, c in (("scoring", "s"), ("audit", "u"), ("admin", "d"))
    }
    with TestClient(app) as client:
        for i, (role, token) in enumerate(tokens.items()):
            app.state.key_cache.put(keys.hash_token(token), Caller(i + 1, f"k-{role}", role))
        yield client, tokens


def _is_database_unavailable(response: Any) -> bool:
    return (
        response.status_code == 503
        and response.json()["error"]["code"] == "database_unavailable"
        and response.headers["Retry-After"].isdigit()
    )


def test_every_route_answers_503_when_the_database_is_unreachable(
    unreachable: tuple[TestClient, dict[str, str]],
) -> None:
    client, tokens = unreachable
    wrong = []
    calls = [(m, p, role) for (m, p), roles in sorted(ACCESS.items()) for role in roles.split()]
    for method, path, role in calls:
        headers = {} if role == PUBLIC else bearer(tokens[role])
        body: dict[str, Any] = {"json": BODIES.get((method, path))}
        if (method, path) in NDJSON:
            body = {"content": NDJSON[(method, path)]}
            headers["Content-Type"] = "application/x-ndjson"
        response = client.request(
            method, _url(path), params=PARAMS.get((method, path)), headers=headers, **body
        )
        if path == "/healthz":
            ok = response.status_code == 200  # liveness: the process is up
        else:
            ok = _is_database_unavailable(response)
        if not ok:
            where = f"{method} {path} as {role}"
            wrong.append(f"{where}: {response.status_code} {response.text[:150]}")
    assert wrong == []


def test_a_key_that_must_be_looked_up_gets_503_too(
    unreachable: tuple[TestClient, dict[str, str]],
) -> None:
    client, _ = unreachable
    response = client.get("/v1/policies", headers=bearer("eh_not_cached"))
    assert _is_database_unavailable(response)
