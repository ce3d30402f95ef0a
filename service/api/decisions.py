"""Decision look-up (audit role): one stored recommendation by its id, with its outcome and
final decision."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter
from pydantic import BaseModel, Field

from service.api.deps import AuditKey, ReadSession
from service.api.errors import error_responses
from service.api.fields import RecommendationIdPath
from service.api.recommendation_schemas import RecommendationResponse
from service.log.records import format_timestamp
from service.store.decision_lookup import StoredDecision, find_decision

router = APIRouter(prefix="/v1/recommendations", tags=["recommendations"])


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
    recommendation_id: RecommendationIdPath, _key: AuditKey, session: ReadSession
) -> DecisionResponse:
    """404 ``unknown_recommendation`` when no recommendation has this id (a text that is not
    a UUID names none)."""
    return DecisionResponse.of(find_decision(session, recommendation_id))
