"""Every endpoint x every role, plus no token, a bad token and a revoked token.

``ACCESS`` is the documented access table (docs/api.md). The matrix is built from the app's
own routes, so a new route without an entry here fails the test: add it with its role.
"""

from __future__ import annotations

from collections.abc import Callable

import pytest
from fastapi.routing import APIRoute
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.store import keys
from tests.helpers import bearer

PUBLIC = "public"
ACCESS: dict[tuple[str, str], str] = {
    ("GET", "/healthz"): PUBLIC,
    ("GET", "/readyz"): PUBLIC,
    ("POST", "/v1/recommendations"): "scoring",
    ("POST", "/v1/recommendations/batch"): "scoring",
    ("GET", "/v1/policies"): "admin",
    ("POST", "/v1/policies/{name}/versions"): "admin",
    ("GET", "/v1/policies/{name}/versions"): "admin",
    ("GET", "/v1/policies/{name}/versions/{version}"): "admin",
    ("POST", "/v1/policies/{name}/versions/{version}/approve"): "admin",
    ("POST", "/v1/policies/{name}/activate"): "admin",
    ("POST", "/v1/policies/{name}/rollback"): "admin",
    ("GET", "/v1/policies/{name}/history"): "admin",
    ("GET", "/v1/policies/{name}/diff"): "admin",
    ("GET", "/v1/policies/{name}/shadow"): "admin",
    ("PUT", "/v1/policies/{name}/shadow"): "admin",
    ("DELETE", "/v1/policies/{name}/shadow"): "admin",
}
CALLERS = ["scoring", "audit", "admin", "none", "bad", "revoked"]


def _routes(client: TestClient) -> list[tuple[str, str]]:
    out = []
    for route in client.app.routes:  # type: ignore[attr-defined]
        if isinstance(route, APIRoute):
            out.extend((m, route.path) for m in sorted(route.methods))
    return out


def _url(path: str) -> str:
    return path.replace("{name}", "readmission").replace("{version}", "1")


def test_access_table_covers_every_route(client: TestClient) -> None:
    missing = [r for r in _routes(client) if r not in ACCESS]
    assert missing == [], f"routes without a documented role: {missing}"


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
            keys.revoke_key(session, "to-revoke")
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
        r = client.request(method, _url(path), **kwargs)  # type: ignore[arg-type]
        where = f"{method} {path} as {caller}: {r.status_code} {r.text[:200]}"
        if needed in (PUBLIC, caller):
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
