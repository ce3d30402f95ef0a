"""Feedback (scoring role): outcomes as they mature, and the person's final decision.

201 when something was written, 200 when the request repeated what is already on record.
The request's session commits before the response is sent (``service.api.deps``).
"""

from __future__ import annotations

from datetime import timedelta

from fastapi import APIRouter, Request, Response
from fastapi.concurrency import run_in_threadpool
from sqlalchemy.orm import Session

from service.api.batch_body import ParsedBatch, documented_body, parse_batch
from service.api.deps import AppSettings, DbSession, ScoringKey
from service.api.errors import error_responses
from service.api.fields import RecommendationIdPath
from service.api.outcome_schemas import (
    FinalRequest,
    FinalResponse,
    OutcomeBatchRequest,
    OutcomeBatchResponse,
    OutcomeRequest,
    OutcomeResponse,
)
from service.errors import BatchRefused, check_batch_size, item_problem
from service.log.records import format_timestamp
from service.store import feedback
from service.store.feedback import FinalReport, ItemsRefused, OutcomeReport, OutcomeResult
from service.store.stored_meanwhile import in_savepoint

router = APIRouter(tags=["feedback"], responses=error_responses(400, 401, 403, 404, 409, 413, 422))


def _report(body: OutcomeRequest) -> OutcomeReport:
    return OutcomeReport(
        outcome=body.outcome,
        observed_at=body.observed_at,
        source=body.source,
        recommendation_id=body.recommendation_id,
        policy=body.policy,
        case_id=body.case_id,
        correction_reason=body.correction.reason if body.correction else None,
    )


def _apply(
    session: Session, items: list[OutcomeReport], actor: str, skew: timedelta
) -> list[OutcomeResult]:
    # A concurrent request recorded one of these outcomes first: decide again against it.
    return in_savepoint(session, lambda: feedback.record_outcomes(session, items, actor, skew))


def _out(r: OutcomeResult) -> OutcomeResponse:
    return OutcomeResponse(
        recommendation_id=r.recommendation_id,
        status=r.status,
        outcome=r.outcome,
        corrections=r.corrections,
    )


@router.post(
    "/v1/outcomes",
    status_code=201,
    response_model=OutcomeResponse,
    summary="Record the outcome of one recommendation (200 when it repeats what is recorded)",
    responses={200: {"model": OutcomeResponse, "description": "Already recorded, unchanged"}},
)
def post_outcome(
    body: OutcomeRequest,
    response: Response,
    session: DbSession,
    key: ScoringKey,
    settings: AppSettings,
) -> OutcomeResponse:
    try:
        (result,) = _apply(session, [_report(body)], key.name, settings.clock_skew)
    except ItemsRefused as exc:
        raise exc.failures[0][1] from None  # the one item's own error
    if result.status == "unchanged":
        response.status_code = 200
    return _out(result)


@router.post(
    "/v1/outcomes/batch",
    status_code=201,
    response_model=OutcomeBatchResponse,
    summary="Record many outcomes: all of them or, if any is refused, none",
    responses={200: {"model": OutcomeBatchResponse, "description": "Every item unchanged"}},
    openapi_extra=documented_body(OutcomeBatchRequest),
)
async def post_outcome_batch(
    request: Request,
    response: Response,
    session: DbSession,
    key: ScoringKey,
    settings: AppSettings,
) -> OutcomeBatchResponse:
    # The body is read here, not by FastAPI, so items that break the schema and items the
    # store refuses are reported together (service.api.batch_body).
    batch = parse_batch(await request.body(), OutcomeBatchRequest, OutcomeRequest)
    check_batch_size(batch.total, settings.max_batch_items)
    results = await run_in_threadpool(_record_batch, session, batch, key.name, settings.clock_skew)
    if all(r.status == "unchanged" for r in results):
        response.status_code = 200
    return OutcomeBatchResponse(items=[_out(r) for r in results])


def _record_batch(
    session: Session, batch: ParsedBatch[OutcomeRequest], actor: str, skew: timedelta
) -> list[OutcomeResult]:
    reports = [_report(i) for i in batch.items]
    if not batch.problems:
        return _apply(session, reports, actor, skew)
    problems = list(batch.problems)
    try:
        feedback.record_outcomes(session, reports, actor, skew)
    except ItemsRefused as exc:
        problems += [item_problem(batch.positions[i], err) for i, err in exc.failures]
    raise BatchRefused(problems, batch.total)  # the session dependency rolls it all back


@router.post(
    "/v1/recommendations/{recommendation_id}/final",
    status_code=201,
    response_model=FinalResponse,
    summary="Record the person's final decision: followed, or overridden with a reason code",
    responses={200: {"model": FinalResponse, "description": "Already recorded, unchanged"}},
)
def post_final(
    recommendation_id: RecommendationIdPath,
    body: FinalRequest,
    response: Response,
    session: DbSession,
    key: ScoringKey,
    settings: AppSettings,
) -> FinalResponse:
    report = FinalReport(
        overridden=body.decision == "overridden",
        decided_at=body.decided_at,
        reason_code=body.reason_code,
        decided_by=body.decided_by,
    )
    skew = settings.clock_skew
    result = in_savepoint(
        session,
        lambda: feedback.record_final(session, recommendation_id, report, key.name, skew),
    )
    if result.status == "unchanged":
        response.status_code = 200
    return FinalResponse(
        recommendation_id=result.recommendation_id,
        status=result.status,
        decision="overridden" if result.overridden else "followed",
        final_action=result.final_action,
        reason_code=result.reason_code,
        decided_at=format_timestamp(result.decided_at),
    )
