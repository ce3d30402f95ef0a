"""Every bad input of issue section 6: a clear 4xx in the one error shape, nothing written."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.app import create_app
from service.settings import Settings
from tests.helpers import TEST_SECRET, bearer, count_rows, make_policy, make_request

R = "/v1/recommendations"
GOOD = (
    '{"request_id":"r1","case_id":"c1","policy":"readmission","score":%s,'
    '"attributes":{"region":"north"}}'
)


def _check(r: Any, status: int, code: str, field: str | None = None) -> None:
    assert r.status_code == status, r.text
    err = r.json()["error"]
    assert set(err) == {"code", "message", "field", "details"}
    assert err["code"] == code
    assert err["message"]
    if field is not None:
        assert err["field"] == field


@pytest.fixture
def ready(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> Iterator[dict[str, str]]:
    publish()
    yield {**bearer(tokens["scoring"]), "content-type": "application/json"}


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity", "1e999"])
def test_non_finite_scores(
    client: TestClient, ready: dict[str, str], literal: str, session_factory: sessionmaker[Session]
) -> None:
    r = client.post(R, content=(GOOD % literal).encode(), headers=ready)
    _check(r, 422, "validation_error", "score")
    batch = '{"items":[' + GOOD % "0.5" + "," + (GOOD % literal).replace("r1", "r2") + "]}"
    r = client.post(f"{R}/batch", content=batch.encode(), headers=ready)
    _check(r, 422, "invalid_batch", "items.1.score")
    assert count_rows(session_factory, "recommendations") == 0


def test_nan_in_attributes(
    client: TestClient, ready: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    body = GOOD.replace('"region":"north"', '"region":"north","age":NaN') % "0.5"
    r = client.post(R, content=body.encode(), headers=ready)
    assert r.status_code == 422
    assert count_rows(session_factory, "recommendations") == 0


@pytest.mark.parametrize(
    ("overrides", "status", "code", "field"),
    [
        ({"score": 1.5}, 422, "score_out_of_range", "score"),
        ({"score": -0.01}, 422, "score_out_of_range", "score"),
        ({"score": "high"}, 422, "validation_error", "score"),
        ({"score": "0.5"}, 422, "validation_error", "score"),
        ({"score": True}, 422, "validation_error", "score"),
        ({"score": None}, 422, "validation_error", "score"),
        ({"attributes": {"region": ["north"]}}, 422, "validation_error", None),
        ({"attributes": "north"}, 422, "validation_error", "attributes"),
        ({"policy": "no-such-policy"}, 422, "unknown_policy", "policy"),
        ({"attributes": {}}, 422, "missing_attribute", "attributes.region"),
        ({"attributes": {"region": None}}, 422, "validation_error", None),
        ({"attributes": {"region": "west"}}, 422, "unknown_group", "attributes"),
        ({"attributes": {"region": "a|b"}}, 422, "validation_error", "attributes.region"),
        ({"request_id": ""}, 422, "validation_error", "request_id"),
        ({"case_id": "x" * 500}, 422, "validation_error", "case_id"),
        ({"extra_field": 1}, 422, "validation_error", "extra_field"),
    ],
)
def test_bad_requests(
    client: TestClient,
    ready: dict[str, str],
    session_factory: sessionmaker[Session],
    overrides: dict[str, Any],
    status: int,
    code: str,
    field: str | None,
) -> None:
    r = client.post(R, json=make_request(**overrides), headers=ready)
    _check(r, status, code, field)
    r = client.post(
        f"{R}/batch", json={"items": [make_request(), make_request(**overrides)]}, headers=ready
    )
    assert r.status_code == status
    assert count_rows(session_factory, "recommendations") == 0


def test_missing_field(
    client: TestClient, ready: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    body = make_request()
    del body["score"]
    _check(client.post(R, json=body, headers=ready), 422, "validation_error", "score")
    assert count_rows(session_factory, "recommendations") == 0


def test_policy_without_active_version(
    client: TestClient,
    ready: dict[str, str],
    tokens: dict[str, str],
    session_factory: sessionmaker[Session],
) -> None:
    draft = make_policy(name="drafted")
    client.post("/v1/policies/drafted/versions", json=draft, headers=bearer(tokens["admin"]))
    r = client.post(R, json=make_request(policy="drafted"), headers=ready)
    _check(r, 409, "no_active_version", "policy")
    assert count_rows(session_factory, "recommendations") == 0


@pytest.mark.parametrize(
    "body",
    [b"{not json", b"", b"[1, 2", b'{"request_id": "r"', b"\xff\xfe", b"null", b"[]", b"42"],
)
def test_malformed_bodies(
    client: TestClient, ready: dict[str, str], session_factory: sessionmaker[Session], body: bytes
) -> None:
    for path in (R, f"{R}/batch", "/v1/policies/readmission/versions"):
        headers = ready if "policies" not in path else {**ready}
        r = client.post(path, content=body, headers=headers)
        assert 400 <= r.status_code < 500, (path, body, r.status_code)
        assert "error" in r.json()
    assert count_rows(session_factory, "recommendations") == 0


def test_malformed_json_code(client: TestClient, ready: dict[str, str]) -> None:
    _check(client.post(R, content=b"{not json", headers=ready), 400, "malformed_json")


def test_oversized_body_by_length_and_by_stream(
    settings: Settings,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    small = settings.model_copy(update={"max_body_bytes": 2048})
    big = {"items": [make_request() for _ in range(40)]}
    with TestClient(create_app(small)) as client:
        headers = bearer(tokens["scoring"])
        _check(client.post(f"{R}/batch", json=big, headers=headers), 413, "body_too_large")

        def chunks() -> Iterator[bytes]:  # no Content-Length: counted while streaming
            yield b'{"items": ['
            for i in range(100):
                yield (b"," if i else b"") + (GOOD % "0.5").replace("r1", f"q{i}").encode()
            yield b"]}"

        r = client.post(
            f"{R}/batch", content=chunks(), headers={**headers, "content-type": "application/json"}
        )
        _check(r, 413, "body_too_large")
        # A small request still passes through the limit untouched.
        assert client.post(R, json=make_request(), headers=headers).status_code == 201
    assert count_rows(session_factory, "recommendations") == 1


def test_unknown_route_and_method(client: TestClient) -> None:
    _check(client.get("/v1/nothing-here"), 404, "not_found")
    _check(client.delete(R), 405, "method_not_allowed")  # GET and POST exist, DELETE not


def test_server_refuses_to_start_without_secret(database_url: str) -> None:
    with pytest.raises(RuntimeError, match="EVENHAND_DRAW_SECRET"):
        create_app(Settings(database_url=database_url, draw_secret=None))


def test_secret_never_in_responses(
    client: TestClient, ready: dict[str, str], publish: Callable[..., int]
) -> None:
    for r in [
        client.post(R, json=make_request(), headers=ready),
        client.post(R, json=make_request(score=9), headers=ready),
        client.get("/openapi.json"),
    ]:
        assert TEST_SECRET not in r.text


def test_readiness_reports_pending_migrations(tmp_path: Path) -> None:
    fresh = Settings(database_url=f"sqlite:///{tmp_path}/fresh.db", draw_secret=TEST_SECRET)  # type: ignore[arg-type]
    with TestClient(create_app(fresh)) as client:
        assert client.get("/healthz").json() == {"status": "ok"}
        _check(client.get("/readyz"), 503, "migrations_pending")


def test_settings_refuse_unknown_time_zone() -> None:
    with pytest.raises(ValueError, match="unknown time zone"):
        Settings(timezone="Mars/Olympus")
    assert Settings(timezone="Europe/Berlin").timezone == "Europe/Berlin"
