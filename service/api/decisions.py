"""Decision look-up (scoring and audit roles): one stored recommendation by its id, or the
decisions of one case, each with its outcome and final decision."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query
from pydantic import BaseModel, Field

from service.api.deps import Caller, ReadSession, require_role
from service.api.errors import error_responses
from service.api.fields import MAX_TEXT_CHARS, SLUG_PATTERN, RecommendationIdPath
from service.api.recommendation_schemas import RecommendationResponse
from service.log.records import format_timestamp
from service.policy.attributes import TEXT_PATTERN
from service.store.decision_lookup import (
    MAX_CASE_PAGE,
    StoredDecision,
    decisions_of_case,
    find_decision,
)

router = APIRouter(prefix="/v1/recommendations", tags=["recommendations"])

ReaderKey = Annotated[Caller, Depends(require_role("scoring", "audit"))]
"""Who may read decisions back: the scoring role (its own systems' decisions) and auditors."""


class ShadowAnswer(BaseModel):
    version: int = Field(description="the shadow version that was evaluated")
    probability: float | None = Field(description="its P(action); null when it could not decide")
    action: bool | None


class OutcomeOnRecord(BaseModel):
    outcome: int = Field(description="the outcome that counts: the latest report")
    observed_at: str
    source: str
    corrections: int = Field(description="how many times the outcome has been corrected")
    recorded_at: str
    recorded_by: str = Field(description="the name of the key that reported it")


class FinalOnRecord(BaseModel):
    decision: str = Field(description="followed or overridden")
    final_action: bool
    reason_code: str | None
    decided_at: str
    decided_by: str | None
    recorded_at: str


class DecisionResponse(BaseModel):
    recommendation: RecommendationResponse = Field(
        description="the response as first sent (the same values a replay returns)"
    )
    record_id: int = Field(
        description="the record's row id in the log: "
        "GET /v1/log/proofs/inclusion?kind=decision&id=<record_id>"
    )
    score: float
    attributes: dict[str, Any] = Field(description="the attributes stored (those grouped by)")
    shadow: ShadowAnswer | None = Field(description="the shadow version's answer, if one ran")
    outcome: OutcomeOnRecord | None = Field(description="null until an outcome is reported")
    final: FinalOnRecord | None = Field(description="null until a final decision is reported")

    @classmethod
    def of(cls, d: StoredDecision) -> DecisionResponse:
        o, f = d.outcome, d.final
        return cls(
            recommendation=RecommendationResponse.model_validate(d.response),
            record_id=d.row_id,
            score=d.score,
            attributes=d.attributes,
            shadow=None
            if d.shadow_version is None
            else ShadowAnswer(
                version=d.shadow_version,
                probability=d.shadow_probability,
                action=d.shadow_action,
            ),
            outcome=None
            if o is None
            else OutcomeOnRecord(
                outcome=o.outcome,
                observed_at=format_timestamp(o.observed_at),
                source=o.source,
                corrections=o.corrections,
                recorded_at=format_timestamp(o.recorded_at),
                recorded_by=o.recorded_by,
            ),
            final=None
            if f is None
            else FinalOnRecord(
                decision="overridden" if f.overridden else "followed",
                final_action=f.final_action,
                reason_code=f.reason_code,
                decided_at=format_timestamp(f.decided_at),
                decided_by=f.decided_by,
                recorded_at=format_timestamp(f.recorded_at),
            ),
        )


@router.get(
    "/{recommendation_id}",
    summary="One stored decision: the response as sent, its inputs, outcome and final decision",
    response_model=DecisionResponse,
    responses=error_responses(401, 403, 404, 422),
)
def get_decision(
    recommendation_id: RecommendationIdPath, _key: ReaderKey, session: ReadSession
) -> DecisionResponse:
    """Roles: scoring, audit. 404 ``unknown_recommendation`` when no recommendation has this
    id (a text that is not a UUID names none)."""
    return DecisionResponse.of(find_decision(session, recommendation_id))


class CaseDecisions(BaseModel):
    decisions: list[DecisionResponse] = Field(
        description="newest first (by record id, the order they were recorded)"
    )
    next_before: int | None = Field(
        description="pass as before= for the next page; null when there is none"
    )


@router.get(
    "",
    summary="The decisions recorded for one case_id, newest first, a page at a time",
    response_model=CaseDecisions,
    responses=error_responses(401, 403, 422),
)
def decisions_for_case(
    _key: ReaderKey,
    session: ReadSession,
    case_id: Annotated[
        str,
        Query(
            min_length=1,
            max_length=MAX_TEXT_CHARS,
            pattern=TEXT_PATTERN,
            description="the case_id sent when scoring",
        ),
    ],
    policy: Annotated[
        str | None, Query(pattern=SLUG_PATTERN, description="only this policy's decisions")
    ] = None,
    limit: Annotated[int, Query(ge=1, le=MAX_CASE_PAGE, description="decisions per page")] = 20,
    before: Annotated[
        int | None,
        Query(ge=1, le=2**62, description="only record ids below this (the previous next_before)"),
    ] = None,
) -> CaseDecisions:
    """Roles: scoring, audit. A case may have several decisions (one per scoring request),
    each as ``GET /v1/recommendations/{id}`` gives it; none is an empty list. Pages of at
    most 50: pass ``next_before`` as ``before`` for the next one."""
    page = decisions_of_case(session, case_id, policy, limit, before)
    return CaseDecisions(
        decisions=[DecisionResponse.of(d) for d in page.decisions], next_before=page.next_before
    )
