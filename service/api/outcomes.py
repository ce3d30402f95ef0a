"""Feedback (scoring role): outcomes as they mature, and the person's final decision.

201 when something was written, 200 when the request repeated what is already on record.
Each route commits before it answers.
"""

from __future__ import annotations

from fastapi import APIRouter, Response
from sqlalchemy.exc import IntegrityError

from service.api.deps import AppSettings, DbSession, ScoringKey
from service.api.errors import error_responses
from service.api.outcome_schemas import (
    FinalRequest,
    FinalResponse,
    OutcomeBatchRequest,
    OutcomeBatchResponse,
    OutcomeRequest,
    OutcomeResponse,
)
from service.errors import check_batch_size
from service.store import feedback
from service.store.feedback import FinalReport, OutcomeReport, OutcomeResult
from service.store.records import format_timestamp

router = APIRouter(tags=["feedback"], responses=error_responses(400, 401, 403, 404, 409, 422))


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


def _apply(session: DbSession, items: list[OutcomeReport], actor: str) -> list[OutcomeResult]:
    try:
        results = feedback.record_outcomes(session, items, actor)
        session.commit()
    except IntegrityError:
        # A concurrent request recorded one of these outcomes first: decide again against it.
        session.rollback()
        results = feedback.record_outcomes(session, items, actor)
        session.commit()
    return results


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
    body: OutcomeRequest, response: Response, session: DbSession, key: ScoringKey
) -> OutcomeResponse:
    (result,) = _apply(session, [_report(body)], key.name)
    if result.status == "unchanged":
        response.status_code = 200
    return _out(result)


@router.post(
    "/v1/outcomes/batch",
    status_code=201,
    response_model=OutcomeBatchResponse,
    summary="Record many outcomes: all of them or, if any is refused, none",
    responses={200: {"model": OutcomeBatchResponse, "description": "Every item unchanged"}},
)
def post_outcome_batch(
    body: OutcomeBatchRequest,
    response: Response,
    session: DbSession,
    key: ScoringKey,
    settings: AppSettings,
) -> OutcomeBatchResponse:
    check_batch_size(len(body.items), settings.max_batch_items)
    results = _apply(session, [_report(i) for i in body.items], key.name)
    if all(r.status == "unchanged" for r in results):
        response.status_code = 200
    return OutcomeBatchResponse(items=[_out(r) for r in results])


@router.post(
    "/v1/recommendations/{recommendation_id}/final",
    status_code=201,
    response_model=FinalResponse,
    summary="Record the person's final decision: followed, or overridden with a reason code",
    responses={200: {"model": FinalResponse, "description": "Already recorded, unchanged"}},
)
def post_final(
    recommendation_id: str,
    body: FinalRequest,
    response: Response,
    session: DbSession,
    key: ScoringKey,
) -> FinalResponse:
    report = FinalReport(
        overridden=body.decision == "overridden",
        decided_at=body.decided_at,
        reason_code=body.reason_code,
        decided_by=body.decided_by,
    )
    try:
        result = feedback.record_final(session, recommendation_id, report)
        session.commit()
    except IntegrityError:
        session.rollback()
        result = feedback.record_final(session, recommendation_id, report)
        session.commit()
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
