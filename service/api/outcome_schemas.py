"""Request and response bodies of the outcome and final-decision routes."""

from __future__ import annotations

from typing import Annotated, Literal, Self

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, model_validator

from service.api.fields import Instant, PolicyName, Reason, Text

Code = Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")]
SKEW = (
    "not before the recommendation was issued, nor in the future, each allowing "
    "EVENHAND_CLOCK_SKEW_SECONDS (300 by default) for clocks that differ"
)


class Correction(BaseModel):
    model_config = ConfigDict(extra="forbid")

    reason: Reason = Field(description="why the earlier outcome was wrong; kept with it")


class OutcomeRequest(BaseModel):
    """An outcome for one recommendation: by ``recommendation_id`` or by (policy, case_id)."""

    model_config = ConfigDict(extra="forbid")

    recommendation_id: Text | None = None
    policy: PolicyName | None = None
    case_id: Text | None = Field(
        default=None, description="with policy: the latest recommendation for this case"
    )
    outcome: Literal[0, 1] = Field(description="1 when the predicted event happened")
    observed_at: Instant = Field(
        description=f"when the outcome was observed, with its UTC offset: {SKEW}"
    )
    source: Text = Field(description="the system or person that reports it")
    correction: Correction | None = Field(
        default=None, description="send to replace a different outcome recorded earlier"
    )

    @model_validator(mode="after")
    def _one_reference(self) -> Self:
        by_id = self.recommendation_id is not None
        by_case = self.policy is not None or self.case_id is not None
        if by_id == by_case:
            raise ValueError("give either recommendation_id, or both policy and case_id")
        if by_case and (self.policy is None or self.case_id is None):
            raise ValueError("policy and case_id go together")
        return self


class OutcomeResponse(BaseModel):
    recommendation_id: str
    status: Literal["recorded", "unchanged", "corrected"]
    outcome: int
    corrections: int = Field(description="how many times this outcome has been corrected")


class OutcomeBatchRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    items: list[OutcomeRequest] = Field(
        min_length=1,
        description="at most EVENHAND_MAX_BATCH_ITEMS items (10,000 by default; more is 413 "
        "batch_too_large); if any item is refused, none is written and every refused item is "
        "listed",
    )


class OutcomeBatchResponse(BaseModel):
    items: list[OutcomeResponse]


class FinalRequest(BaseModel):
    """The person's final decision on a recommendation."""

    model_config = ConfigDict(extra="forbid")

    decision: Literal["followed", "overridden"]
    reason_code: Code | None = Field(
        default=None, description="required when overridden: the organisation's reason code"
    )
    decided_at: Instant = Field(description=f"when the person decided, with its UTC offset: {SKEW}")
    decided_by: Text | None = Field(default=None, description="a role or pseudonymous id")

    @model_validator(mode="after")
    def _reason_for_override(self) -> Self:
        if self.decision == "overridden" and self.reason_code is None:
            raise ValueError("an override needs a reason_code")
        return self


class FinalResponse(BaseModel):
    recommendation_id: str
    status: Literal["recorded", "unchanged"]
    decision: Literal["followed", "overridden"]
    final_action: bool = Field(description="whether the action was finally taken")
    reason_code: str | None
    decided_at: str
