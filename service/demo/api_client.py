"""A small synchronous HTTP client for a running Evenhand server (demo, tests, benchmarks).

Each call raises :class:`ApiError` with the server's error code and message on a non-2xx
answer, so a script stops at the first refusal with a readable reason.
"""

from __future__ import annotations

from typing import Any

import httpx


class ApiError(RuntimeError):
    def __init__(self, status: int, body: Any) -> None:
        self.status = status
        self.body = body
        error = body.get("error", {}) if isinstance(body, dict) else {}
        super().__init__(f"HTTP {status} {error.get('code', '')}: {error.get('message', body)}")


def _json(response: httpx.Response) -> Any:
    try:
        body = response.json()
    except ValueError:
        body = response.text
    if response.status_code >= 400:
        raise ApiError(response.status_code, body)
    return body


class EvenhandClient:
    def __init__(self, base_url: str, timeout: float = 30.0) -> None:
        self._http = httpx.Client(base_url=base_url, timeout=timeout)

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> EvenhandClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @staticmethod
    def _auth(token: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {token}"}

    def get(self, path: str, token: str, **params: Any) -> Any:
        return _json(self._http.get(path, headers=self._auth(token), params=params))

    def post(self, path: str, token: str, body: Any) -> Any:
        return _json(self._http.post(path, headers=self._auth(token), json=body))

    # -- policies (admin) ------------------------------------------------------------------

    def submit(self, token: str, document: dict[str, Any]) -> int:
        name = document["name"]
        version: int = self.post(f"/v1/policies/{name}/versions", token, document)["version"]
        return version

    def approve(self, token: str, name: str, version: int) -> None:
        self.post(f"/v1/policies/{name}/versions/{version}/approve", token, {})

    def activate(
        self,
        token: str,
        name: str,
        version: int,
        reason: str | None = None,
        *,
        expected_current: int | None,
    ) -> None:
        """``expected_current``: the version active now (None: none), so a retry is safe."""
        body = {"version": version, "reason": reason, "expected_current": expected_current}
        self.post(f"/v1/policies/{name}/activate", token, body)

    def rollback(
        self,
        token: str,
        name: str,
        reason: str,
        to_version: int | None = None,
        *,
        expected_current: int | None,
    ) -> int:
        body: dict[str, Any] = {"reason": reason, "expected_current": expected_current}
        if to_version is not None:
            body["to_version"] = to_version
        version: int = self.post(f"/v1/policies/{name}/rollback", token, body)["version"]
        return version

    def history(self, token: str, name: str) -> list[dict[str, Any]]:
        events: list[dict[str, Any]] = self.get(f"/v1/policies/{name}/history", token)
        return events

    def publish(
        self,
        author: str,
        reviewer: str,
        document: dict[str, Any],
        reason: str,
        *,
        expected_current: int | None,
    ) -> int:
        """Submit (author), approve (a second admin key) and activate: the four-eyes path.
        ``expected_current``: the version active before (None: none)."""
        version = self.submit(author, document)
        self.approve(reviewer, document["name"], version)
        self.activate(author, document["name"], version, reason, expected_current=expected_current)
        return version

    # -- scoring and the log ---------------------------------------------------------------

    def recommend(self, token: str, body: dict[str, Any]) -> dict[str, Any]:
        out: dict[str, Any] = self.post("/v1/recommendations", token, body)
        return out

    def recommend_batch(self, token: str, items: list[dict[str, Any]]) -> dict[str, Any]:
        out: dict[str, Any] = self.post("/v1/recommendations/batch", token, {"items": items})
        return out

    def verify(self, token: str) -> dict[str, Any]:
        out: dict[str, Any] = self.get("/v1/log/verify", token)
        return out
