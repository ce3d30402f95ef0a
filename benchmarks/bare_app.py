"""The baselines for bench_scoring.py: FastAPI with the same request models, and nothing else.

No database, no authentication, no policy: it validates a ``RecommendationRequest`` (or a
``BatchRequest``) and returns a fixed answer of the same shape as JSON, so the difference to
the real endpoint is the service's own work: authentication, the policy lookup, the decision
and the durable write. ``EVENHAND_BENCH_BARE_ROUTE`` picks the kind of single route:

- ``async`` (the default; a coroutine, like the service's single-recommendation route);
- ``sync`` (a plain function, which FastAPI runs in its thread pool: one thread hop per
  request, and slower);
- ``service-canned``: not a bare app but Evenhand itself (``service.app.create_app``, with its
  middleware, authentication, error handlers and routes), whose group committer is replaced
  after start-up by one that answers at once without deciding or writing anything. It
  measures the service's HTTP layer alone: the most the whole service could reach.

The bare app's batch route (``POST /v1/recommendations/batch``, a sync route like the
service's) answers each item with the fixed answer: the framework's share of a batch.
"""

from __future__ import annotations

import json
import os
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI, Response

from service.api.recommendation_schemas import BatchRequest, RecommendationRequest

ROUTE_KIND_VARIABLE = "EVENHAND_BENCH_BARE_ROUTE"


def _answer_text(body: RecommendationRequest) -> str:
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
    return json.dumps(out, separators=(",", ":"))


def _answer(body: RecommendationRequest) -> Response:
    return Response(_answer_text(body), status_code=201, media_type="application/json")


class CannedCommitter:
    """Stands in for the group committer: the fixed answer at once, nothing decided or kept."""

    async def recommend(self, request: RecommendationRequest) -> tuple[str, bool]:
        return _answer_text(request), True


def _service_with_canned_committer() -> FastAPI:
    from service.app import create_app as create_service_app

    app = create_service_app()
    service_lifespan = app.router.lifespan_context

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        async with service_lifespan(app):
            app.state.committer = CannedCommitter()
            yield

    app.router.lifespan_context = lifespan
    return app


def create_app() -> FastAPI:
    kind = os.environ.get(ROUTE_KIND_VARIABLE, "async")
    if kind == "service-canned":
        return _service_with_canned_committer()
    app = FastAPI(title="bare baseline")
    if kind == "async":

        @app.post("/v1/recommendations", status_code=201)
        async def recommend(body: RecommendationRequest) -> Response:
            return _answer(body)

    elif kind == "sync":

        @app.post("/v1/recommendations", status_code=201)
        def recommend_in_thread(body: RecommendationRequest) -> Response:
            return _answer(body)

    else:
        raise SystemExit(
            f"{ROUTE_KIND_VARIABLE} must be async, sync or service-canned, not {kind!r}"
        )

    @app.post("/v1/recommendations/batch", status_code=201)
    def recommend_batch(body: BatchRequest) -> Response:
        items = [_answer_text(item) for item in body.items]
        text = f'{{"items":[{",".join(items)}],"created":{len(items)}}}'
        return Response(text, status_code=201, media_type="application/json")

    return app
