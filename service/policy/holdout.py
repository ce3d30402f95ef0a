"""Holdout: fit on one stratified part of the calibration data, check rates on the rest."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.policy.derive import CalibrationData, DeriveError
from service.policy.document import PolicyDocument
from service.policy.rates import expected_counts_by_group
from service.policy.rules import rule_for, rule_probabilities
from service.stats.proportions import wilson_interval_for_rate


def stratified_split(
    data: CalibrationData, fraction: float, seed: int
) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """(fit rows, holdout rows): ``fraction`` of every (group, outcome) stratum held out."""
    if not 0.0 < fraction < 1.0:
        raise DeriveError(f"holdout fraction must be between 0 and 1, got {fraction}", "holdout")
    rng = np.random.default_rng(seed)
    strata = data.group_codes.astype(np.int64) * 2 + data.outcomes.astype(np.int64)
    held: list[npt.NDArray[np.intp]] = []
    for stratum in np.unique(strata):
        rows = np.flatnonzero(strata == stratum)
        rng.shuffle(rows)
        held.append(rows[: round(fraction * len(rows))])
    mask = np.zeros(len(data.scores), dtype=bool)
    if held:
        mask[np.concatenate(held)] = True
    return np.flatnonzero(~mask), np.flatnonzero(mask)


def subset(data: CalibrationData, rows: npt.NDArray[np.intp]) -> CalibrationData:
    """The same groups (same codes) restricted to ``rows``."""
    return CalibrationData(
        data.scores[rows],
        data.outcomes[rows],
        data.group_codes[rows],
        data.group_keys,
        data.attributes,
    )


@dataclass(frozen=True)
class RateWithInterval:
    value: float | None
    low: float | None
    high: float | None
    trials: int


@dataclass(frozen=True)
class HoldoutGroup:
    key: str
    n: int
    action_rate: RateWithInterval
    tpr: RateWithInterval
    fpr: RateWithInterval


def _with_interval(value: float, trials: int) -> RateWithInterval:
    if trials == 0 or not np.isfinite(value):
        return RateWithInterval(None, None, None, trials)
    low, high = wilson_interval_for_rate(min(1.0, max(0.0, value)), trials)
    return RateWithInterval(value, low, high, trials)


def holdout_rates(
    policy: PolicyDocument, data: CalibrationData
) -> tuple[list[HoldoutGroup], float]:
    """Expected rates of the policy's rules on held-out rows, Wilson 95% intervals, and cost.

    Rates are exact sums of the rules' probabilities; each interval treats the group's rate
    as a proportion of its trials (rows, positives or negatives).
    """
    probabilities = np.empty(len(data.scores))
    for code, key in enumerate(data.group_keys):
        rows = np.flatnonzero(data.group_codes == code)
        _, rule = rule_for(policy, key)
        probabilities[rows] = rule_probabilities(rule, data.scores[rows])
    counts = expected_counts_by_group(
        probabilities, data.outcomes, data.group_codes, len(data.group_keys)
    )
    out: list[HoldoutGroup] = []
    for g, key in enumerate(data.group_keys):
        n, pos, neg = (round(float(a[g])) for a in (counts.n, counts.positives, counts.negatives))
        out.append(
            HoldoutGroup(
                key,
                n,
                _with_interval(float(counts.action_rate[g]), n),
                _with_interval(float(counts.tpr[g]), pos),
                _with_interval(float(counts.fpr[g]), neg),
            )
        )
    total = counts.total().cost_per_case(policy.costs.false_positive, policy.costs.false_negative)
    return out, float(total[0])
