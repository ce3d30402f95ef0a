"""Request and response bodies of the scoring routes."""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, field_validator
from pydantic_core import PydanticCustomError

from service.api.fields import AttributeName, AttributeValue, PolicyName, Text
from service.policy.attributes import MAX_ATTRIBUTES, MAX_NAME_CHARS, MAX_VALUE_CHARS

# A JSON number only: no "0.5" strings, no true/false.
Score = Annotated[float, Field(allow_inf_nan=False, strict=True)]


class RecommendationRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    request_id: Text = Field(description="the caller's idempotency key for this request")
    case_id: Text = Field(description="the case; the keyed draw depends on it")
    policy: PolicyName = Field(description="policy name; its active version decides")
    score: Score = Field(description="the model's score, within the policy's score_range")
    attributes: dict[AttributeName, AttributeValue] = Field(
        default_factory=dict,
        max_length=MAX_ATTRIBUTES,
        description=f"the attributes the policy groups by (only those are stored): at most "
        f"{MAX_ATTRIBUTES}, names of 1 to {MAX_NAME_CHARS} characters, values JSON strings of "
        f"1 to {MAX_VALUE_CHARS} characters. A value is read as text: surrounding white space "
        "removed, Unicode NFC, letter case kept; booleans, numbers, null, control characters "
        'and \'|\' are refused. Send "true" or "1" as strings.',
    )

    @field_validator("attributes", mode="before")
    @classmethod
    def _not_too_many(cls, value: Any) -> Any:
        # Counted before any value is read, so a huge object is refused at once.
        if isinstance(value, dict) and len(value) > MAX_ATTRIBUTES:
            raise PydanticCustomError(
                "too_many_attributes",
                "holds {count} attributes; at most {limit} are accepted",
                {"count": len(value), "limit": MAX_ATTRIBUTES},
            )
        return value


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

    items: list[RecommendationRequest] = Field(
        min_length=1,
        description="at most EVENHAND_MAX_BATCH_ITEMS items (10,000 by default; more is 413 "
        "batch_too_large); if any item is refused, none is written and every refused item is "
        "listed",
    )


class BatchResponse(BaseModel):
    items: list[RecommendationResponse]
    created: int = Field(description="how many were new; the rest were stored replays")
