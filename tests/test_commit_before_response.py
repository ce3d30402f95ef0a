"""A recommendation is committed before the first byte of its response is sent.

FastAPI (0.118 and later) runs the exit code of yield dependencies after the response has
been sent, so the routes commit explicitly. This test watches the ASGI ``send`` channel:
when the response starts, a separate connection must already see the committed record.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from fastapi.testclient import TestClient
from sqlalchemy import Engine, text

from service.app import create_app
from service.settings import Settings
from tests.helpers import bearer, make_request


def test_record_is_visible_to_another_connection_when_response_starts(
    settings: Settings,
    engine: Engine,
    tokens: dict[str, str],
    client: TestClient,
    publish: Callable[..., int],
) -> None:
    publish()
    app = create_app(settings)
    seen: list[tuple[str, int]] = []

    async def watching(scope: Any, receive: Any, send: Any) -> None:
        async def watched_send(message: Any) -> None:
            if message["type"] == "http.response.start" and scope["path"].startswith(
                "/v1/recommendations"
            ):
                with engine.connect() as conn:
                    n = conn.execute(text("SELECT COUNT(*) FROM recommendations")).scalar_one()
                seen.append((scope["path"], int(n)))
            await send(message)

        await app(scope, receive, watched_send)

    with TestClient(watching) as watched:  # type: ignore[arg-type]
        r1 = watched.post(
            "/v1/recommendations", json=make_request(), headers=bearer(tokens["scoring"])
        )
        items = [make_request() for _ in range(3)]
        r2 = watched.post(
            "/v1/recommendations/batch", json={"items": items}, headers=bearer(tokens["scoring"])
        )
    assert (r1.status_code, r2.status_code) == (201, 201)
    assert seen == [("/v1/recommendations", 1), ("/v1/recommendations/batch", 4)]
