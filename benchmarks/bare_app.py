"""The baseline for bench_scoring.py: FastAPI with the same request model, and nothing else.

No database, no authentication, no policy: it validates a ``RecommendationRequest`` and
returns a fixed answer of the same shape as pre-encoded JSON, so the difference to the real
endpoint is the service's own work: authentication, the policy lookup, the decision and the
durable write. ``EVENHAND_BENCH_BARE_ROUTE`` picks the kind of route: ``async`` (the
default; a coroutine, like the service's single-recommendation route) or ``sync`` (a plain
function, which FastAPI runs in its thread pool: one thread hop per request, and slower).
"""

from __future__ import annotations

import json
import os

from fastapi import FastAPI, Response

from service.api.recommendation_schemas import RecommendationRequest

ROUTE_KIND_VARIABLE = "EVENHAND_BENCH_BARE_ROUTE"


def _answer(body: RecommendationRequest) -> Response:
    out = {
        "recommendation_id": "00000000-0000-0000-0000-000000000000",
        "request_id": body.request_id,
        "case_id": body.case_id,
        "policy": body.policy,
        "version": 1,
        "group": "|".join(str(v) for v in body.attributes.values()),
        "rule": "default",
        "probability": 1.0,
        "draw": 0.5,
        "action": True,
        "action_label": "act",
        "issued_at": "2026-10-01T00:00:00.000000Z",
    }
    payload = json.dumps(out, separators=(",", ":")).encode()
    return Response(payload, status_code=201, media_type="application/json")


def create_app() -> FastAPI:
    app = FastAPI(title="bare baseline")
    kind = os.environ.get(ROUTE_KIND_VARIABLE, "async")
    if kind == "async":

        @app.post("/v1/recommendations", status_code=201)
        async def recommend(body: RecommendationRequest) -> Response:
            return _answer(body)

    elif kind == "sync":

        @app.post("/v1/recommendations", status_code=201)
        def recommend_in_thread(body: RecommendationRequest) -> Response:
            return _answer(body)

    else:
        raise SystemExit(f"{ROUTE_KIND_VARIABLE} must be async or sync, not {kind!r}")
    return app
