"""Every endpoint x every role, plus no token, a bad token and a revoked token.

``ACCESS`` is the documented access table (docs/api.md). The matrix is built from the app's
own routes, so a new route without an entry here fails the test: add it with its role.
"""

from __future__ import annotations

from collections.abc import Callable

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.app import create_app
from service.settings import Settings
from service.store import keys
from tests.helpers import bearer

PUBLIC = "public"
ACCESS: dict[tuple[str, str], str] = {
    ("GET", "/healthz"): PUBLIC,
    ("GET", "/readyz"): PUBLIC,
    ("POST", "/v1/recommendations"): "scoring",
    ("POST", "/v1/recommendations/batch"): "scoring",
    ("POST", "/v1/recommendations/stream"): "scoring",
    ("GET", "/v1/policies"): "admin audit",
    ("POST", "/v1/policies/{name}/versions"): "admin",
    ("GET", "/v1/policies/{name}/versions"): "admin audit",
    ("GET", "/v1/policies/{name}/versions/{version}"): "admin audit",
    ("POST", "/v1/policies/{name}/versions/{version}/approve"): "admin",
    ("POST", "/v1/policies/{name}/activate"): "admin",
    ("POST", "/v1/policies/{name}/rollback"): "admin",
    ("GET", "/v1/policies/{name}/history"): "admin audit",
    ("GET", "/v1/policies/{name}/diff"): "admin audit",
    ("GET", "/v1/policies/{name}/shadow"): "admin audit",
    ("PUT", "/v1/policies/{name}/shadow"): "admin",
    ("DELETE", "/v1/policies/{name}/shadow"): "admin",
    ("GET", "/v1/keys"): "admin",
    ("POST", "/v1/keys/{name}/revoke"): "admin",
    ("GET", "/v1/log/verify"): "audit",
    ("GET", "/v1/log/keys"): PUBLIC,
    ("GET", "/v1/log/heads"): "audit",
    ("GET", "/v1/log/proofs/inclusion"): "audit",
    ("GET", "/v1/log/proofs/consistency"): "audit",
    ("GET", "/v1/log/bundle"): "audit",
    ("POST", "/v1/audits"): "audit",
    ("GET", "/v1/reports/{policy}"): "audit",
    ("GET", "/v1/reports/{policy}/{month_file}"): "audit",
    ("GET", "/v1/reports/{policy}/history"): "audit",
    ("GET", "/v1/warnings/{policy}"): "audit",
    ("POST", "/v1/outcomes"): "scoring",
    ("POST", "/v1/outcomes/batch"): "scoring",
    ("POST", "/v1/recommendations/{recommendation_id}/final"): "scoring",
    ("GET", "/v1/recommendations/{recommendation_id}"): "scoring audit",
    ("GET", "/v1/recommendations"): "scoring audit",
}
"""Each route's role, or roles separated by a space."""
CALLERS = ["scoring", "audit", "admin", "none", "bad", "revoked"]


def _routes(client: TestClient) -> list[tuple[str, str]]:
    # From the OpenAPI document: it lists every route of every included router (the router
    # objects themselves are wrapped differently across FastAPI versions).
    paths = client.get("/openapi.json").json()["paths"]
    return sorted((m.upper(), p) for p, ops in paths.items() for m in ops)


PATH_VALUES = {
    "{name}": "readmission",
    "{policy}": "readmission",
    "{version}": "1",
    "{month_file}": "2026-12.html",
    "{recommendation_id}": "00000000-0000-4000-8000-000000000000",
}


def _url(path: str) -> str:
    for placeholder, value in PATH_VALUES.items():
        path = path.replace(placeholder, value)
    assert "{" not in path, f"add a value for the path parameter of {path}"
    return path


def test_access_table_covers_every_route(client: TestClient) -> None:
    routes = _routes(client)
    missing = [r for r in routes if r not in ACCESS]
    assert missing == [], f"routes without a documented role: {missing}"
    # Both ways: a stale entry, or a matrix that runs over no routes, fails too.
    assert set(routes) == set(ACCESS)


@pytest.mark.parametrize("caller", CALLERS)
def test_access_matrix(
    client: TestClient,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    caller: str,
) -> None:
    if caller in ("scoring", "audit", "admin"):
        headers = bearer(make_key(caller))
    elif caller == "bad":
        headers = bearer("eh_not-a-real-token")
    elif caller == "revoked":
        token = make_key("admin", "to-revoke")
        with session_factory() as session:
            keys.revoke_key(session, "to-revoke", "test", "operator", keep_an_admin=False)
            session.commit()
        headers = bearer(token)
    else:
        headers = {}
    for method, path in _routes(client):
        needed = ACCESS[(method, path)]
        kwargs: dict[str, object] = {"headers": headers}
        if method in ("POST", "PUT"):
            kwargs["json"] = {}
        if path.endswith("/diff"):
            kwargs["params"] = {"from": 1, "to": 1}
        if (method, path) == ("GET", "/v1/recommendations"):
            kwargs["params"] = {"case_id": "c-1"}
        r = client.request(method, _url(path), **kwargs)  # type: ignore[arg-type]
        where = f"{method} {path} as {caller}: {r.status_code} {r.text[:200]}"
        if needed == PUBLIC or caller in needed.split():
            assert r.status_code not in (401, 403), where
        elif caller in ("none", "bad", "revoked"):
            assert r.status_code == 401, where
            assert r.json()["error"]["code"] == "unauthorized", where
            assert r.headers.get("www-authenticate") == "Bearer", where
        else:
            assert r.status_code == 403, where
            assert r.json()["error"]["code"] == "forbidden", where


def test_malformed_authorization_headers(client: TestClient, make_key: Callable[..., str]) -> None:
    token = make_key("scoring")
    for value in [token, f"Basic {token}", "Bearer", "Bearer  ", f"Token {token}"]:
        r = client.post("/v1/recommendations", json={}, headers={"Authorization": value})
        assert r.status_code == 401, value


@pytest.mark.parametrize("ttl", [0.0, 3600.0])
def test_revocation_and_the_key_cache(
    settings: Settings,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    ttl: float,
) -> None:
    token = make_key("admin", "soon-revoked")
    with TestClient(create_app(settings.model_copy(update={"auth_cache_seconds": ttl}))) as c:
        assert c.get("/v1/policies", headers=bearer(token)).status_code == 200
        with session_factory() as session:
            keys.revoke_key(session, "soon-revoked", "test", "operator", keep_an_admin=False)
            session.commit()
        after = c.get("/v1/policies", headers=bearer(token)).status_code
    # Without the cache the next request is refused; with it, the process keeps trusting a
    # key it has just checked until the entry expires (docs/operations.md).
    assert after == (401 if ttl == 0 else 200)
    with TestClient(create_app(settings)) as fresh:
        assert fresh.get("/v1/policies", headers=bearer(token)).status_code == 401
