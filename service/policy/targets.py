"""What a policy version promises (the ``targets`` of its document): the criterion it was
derived under, and per group the rates expected on calibration data, with the out-of-sample
counts and bootstrap standard errors the audit tests them against."""

from __future__ import annotations

from enum import StrEnum
from itertools import pairwise
from typing import Self

from pydantic import (
    Field,
    model_validator,
)

from service.policy.values import (
    MAX_COUNT,
    Cost,
    Count,
    GroupKey,
    NonNegative,
    Probability,
    Prose,
    ScoreValue,
    StrictModel,
)


class Criterion(StrEnum):
    MAX_UTILITY = "max-utility"
    SINGLE_CUT = "single-cut"
    DEMOGRAPHIC_PARITY = "demographic-parity"
    EQUAL_OPPORTUNITY = "equal-opportunity"
    PREDICTIVE_EQUALITY = "predictive-equality"
    EQUALIZED_ODDS = "equalized-odds"
    FOUR_FIFTHS = "four-fifths"


class CalibrationCounts(StrictModel):
    """The counts one group's promised rates rest on, from calibration rows the rules were not
    fitted on (cross-fitting): ``n`` rows, ``positives`` of them with outcome 1, and the rules'
    expected actions among the positives (``tp``) and the negatives (``fp``), sums of
    P(action | score). The audit compares a month's realized counts with these as a second
    sample, not with an exact number."""

    n: int = Field(ge=1, le=MAX_COUNT)
    positives: Count
    tp: NonNegative
    fp: NonNegative

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        slack = 1e-6 * max(1, self.n)  # sums of probabilities carry rounding
        if self.positives > self.n:
            raise ValueError(f"positives ({self.positives}) exceed n ({self.n})")
        if self.tp > self.positives + slack:
            raise ValueError(f"tp ({self.tp}) exceeds positives ({self.positives})")
        if self.fp > self.n - self.positives + slack:
            raise ValueError(f"fp ({self.fp}) exceeds negatives ({self.n - self.positives})")
        return self


class PromiseErrors(StrictModel):
    """Bootstrap standard errors of one group's cross-fitted promised rates.

    Each is the standard deviation of the promised rate's error over resamples of the
    calibration rows (rows drawn with replacement within each group, the cross-fitting run
    again on each; the error is the resample's promise minus the rate of the resample's own
    fitted rules on the original rows: Efron & Tibshirani 1993, An Introduction to the
    Bootstrap, ch. 10). Versions derived before that estimator store the standard deviation of
    the resampled promise itself (larger; audited as stored). The audit widens its two-sample
    test of a promise by the design effect, this variance over the binomial variance of the
    promise (Rao & Scott 1992). None: the rate was undefined on too many resamples to say.
    """

    action_rate: NonNegative | None = None
    tpr: NonNegative | None = None
    fpr: NonNegative | None = None


class GroupTarget(StrictModel):
    """Rates the policy was expected to produce for one group on its calibration data.

    With ``out_of_sample`` the rates are those counts' ratios (honest promises); without it
    they are in-sample figures, taken by the audit as exact numbers. ``standard_errors``
    (only with ``out_of_sample``) are the promised rates' bootstrap standard errors; a document
    without them is audited with the promise as a binomial sample of its counts.
    """

    n: Count | None = None
    prevalence: Probability | None = None
    action_rate: Probability
    tpr: Probability
    fpr: Probability
    out_of_sample: CalibrationCounts | None = None
    standard_errors: PromiseErrors | None = Field(
        default=None,
        description="bootstrap standard errors of the cross-fitted promised rates "
        "(needs out_of_sample)",
    )
    score_counts: list[Count] | None = Field(
        default=None,
        description="calibration rows per score bin (bins cut at targets.score_edges)",
    )
    outside_promise: Prose | None = Field(
        default=None,
        description="why the criterion's promise does not cover this group (None: it does), "
        "e.g. a fallback rule that misses the criterion on the calibration data",
    )

    @model_validator(mode="after")
    def _errors_of_counts(self) -> Self:
        if self.standard_errors is not None and self.out_of_sample is None:
            raise ValueError(
                "standard_errors are those of cross-fitted promises: they need out_of_sample"
            )
        return self


class Targets(StrictModel):
    criterion: Criterion
    tolerance: NonNegative | None = Field(
        default=None,
        description="largest gap between groups (for gap criteria) and between realized and "
        "promised rates that keeps the promise; required and positive at submit",
    )
    expected_cost: Cost | None = None
    reference_group: GroupKey | None = Field(
        default=None,
        description="group every gap is taken against, and the four-fifths comparator "
        "(default: the largest calibration group for gaps, the calibration group with the "
        "highest favourable rate for four-fifths)",
    )
    capacity: Probability | None = Field(
        default=None, description="largest overall action rate the rules were derived under"
    )
    folds: int | None = Field(
        default=None,
        ge=2,
        le=1000,
        description="cross-fitting folds behind groups[*].out_of_sample",
    )
    resamples: int | None = Field(
        default=None,
        ge=2,
        le=100000,
        description="bootstrap resamples behind groups[*].standard_errors",
    )
    score_edges: list[ScoreValue] | None = Field(
        default=None,
        description="inner edges of the score bins of groups[*].score_counts, increasing",
    )
    groups: dict[GroupKey, GroupTarget] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _bins_match(self) -> Self:
        edges = self.score_edges
        if edges is not None and any(b <= a for a, b in pairwise(edges)):
            raise ValueError("targets.score_edges must be strictly increasing")
        for key, target in self.groups.items():
            if target.score_counts is None:
                continue
            if edges is None or len(target.score_counts) != len(edges) + 1:
                raise ValueError(
                    f"targets.groups[{key!r}].score_counts needs one count per bin "
                    "(len(targets.score_edges) + 1)"
                )
        return self
