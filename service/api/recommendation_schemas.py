"""Request and response bodies of the scoring routes."""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, StringConstraints

Text = Annotated[str, StringConstraints(min_length=1, max_length=128)]
AttributeName = Annotated[str, StringConstraints(min_length=1, max_length=64)]
AttributeText = Annotated[str, StringConstraints(max_length=256)]
Finite = Annotated[float, Field(allow_inf_nan=False)]


class RecommendationRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    request_id: Text = Field(description="the caller's idempotency key for this request")
    case_id: Text = Field(description="the case; the keyed draw depends on it")
    policy: Text = Field(description="policy name; its active version decides")
    score: Finite = Field(description="the model's score, within the policy's score_range")
    attributes: dict[AttributeName, AttributeText | bool | int | Finite] = Field(
        default_factory=dict,
        description="the attributes the policy groups by; only those are stored",
    )


class RecommendationResponse(BaseModel):
    recommendation_id: str
    request_id: str
    case_id: str
    policy: str
    version: int
    group: str
    rule: str = Field(description="the rule key used: the group, a parent group or 'default'")
    probability: float = Field(description="P(action | score) under the rule")
    draw: float = Field(description="the keyed draw u in [0, 1); action iff u < probability")
    action: bool
    action_label: str
    issued_at: str = Field(description="UTC, ISO 8601 with microseconds")


class BatchRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    items: list[RecommendationRequest] = Field(min_length=1)


class BatchResponse(BaseModel):
    items: list[RecommendationResponse]
    created: int = Field(description="how many were new; the rest were stored replays")
