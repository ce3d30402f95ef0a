"""Scoring (scoring role): one recommendation or a batch, each on the record before the reply.

Both routes commit before they answer: the decision and its log record are durable before a
byte of the response is sent. Single recommendations go through the group committer
(``service.store.committer``), which answers only after the shared transaction has committed;
a batch is one transaction of its own.
"""

from __future__ import annotations

from fastapi import APIRouter, Request, Response
from fastapi.concurrency import run_in_threadpool

from service.api.batch_body import ParsedBatch, documented_body, parse_batch
from service.api.deps import ScoringKey
from service.api.errors import error_responses
from service.api.recommendation_schemas import (
    BatchRequest,
    BatchResponse,
    RecommendationRequest,
    RecommendationResponse,
)
from service.errors import BatchRefused, check_batch_size
from service.log.records import batch_response_text
from service.store import scoring
from service.store.committer import GroupCommitter
from service.store.scoring import ScoringContext

router = APIRouter(
    prefix="/v1/recommendations",
    tags=["recommendations"],
    responses=error_responses(400, 401, 403, 409, 413, 422),
)


def _json_text(body: str, status: int) -> Response:
    return Response(body.encode("utf-8"), status_code=status, media_type="application/json")


def _context(request: Request) -> ScoringContext:
    ctx: ScoringContext = request.app.state.scoring
    return ctx


@router.post(
    "",
    status_code=201,
    summary="One recommendation (200 with the stored answer when request_id repeats)",
    response_model=None,
    responses={
        201: {"model": RecommendationResponse, "description": "Recorded and returned"},
        200: {"model": RecommendationResponse, "description": "Replay of a stored request"},
    },
)
async def recommend(body: RecommendationRequest, request: Request, _key: ScoringKey) -> Response:
    # A coroutine that only waits: the committer thread decides and records the request in
    # a group with whatever else is queued, and answers once that group has committed.
    committer: GroupCommitter = request.app.state.committer
    result, created = await committer.recommend(body)
    return _json_text(result, 201 if created else 200)


@router.post(
    "/batch",
    status_code=201,
    summary="Up to max_batch_items recommendations, validated as a whole, one transaction",
    response_model=None,
    responses={
        201: {"model": BatchResponse, "description": "Recorded (some items may be replays)"},
        200: {"model": BatchResponse, "description": "Every item was a replay"},
    },
    openapi_extra=documented_body(BatchRequest),
)
async def recommend_batch(request: Request, _key: ScoringKey) -> Response:
    # The body is read here, not by FastAPI, so items that break the schema and items the
    # store refuses are reported together (service.api.batch_body).
    batch = parse_batch(await request.body(), BatchRequest, RecommendationRequest)
    ctx = _context(request)
    check_batch_size(batch.total, ctx.max_batch_items)
    return await run_in_threadpool(_decide_batch, request, batch, ctx)


def _decide_batch(
    request: Request, batch: ParsedBatch[RecommendationRequest], ctx: ScoringContext
) -> Response:
    engine = request.app.state.engine
    if batch.problems:
        more = scoring.batch_problems(engine, batch.items, ctx, batch.positions)
        raise BatchRefused(batch.problems + more, batch.total)
    items, created = scoring.recommend_batch(engine, batch.items, ctx)
    # The items are JSON texts already (the same bytes a single request would get).
    return _json_text(batch_response_text(items, created), 201 if created else 200)
