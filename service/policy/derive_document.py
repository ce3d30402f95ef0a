"""The derived policy document: rules fitted on all rows, promises from cross-fitting.

``targets`` holds what the audit compares a month with: per group the cross-fitted counts
(``out_of_sample``) and their ratios as the promised rates, the calibration rows per score
bin (``score_counts``, bins cut at ``targets.score_edges``) as the baseline of score-drift
checks, ``outside_promise`` for groups the criterion's promise does not cover, and, when the
promises were bootstrapped (:mod:`service.policy.promise_spread`), their standard errors
(``standard_errors``, with ``targets.resamples``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt

from service.policy.crossfit import CrossFitted
from service.policy.derive import Solution
from service.policy.document import Costs, Fallback, Groups, PolicyDocument
from service.policy.promise_spread import PromiseSpread
from service.policy.targets import Criterion, GroupTarget, PromiseErrors, Targets
from service.policy.units import DEFAULT_UNIT, POOLED_UNIT, CalibrationData, FloatArray, Prepared

DECILES = np.arange(1, 10) / 10.0


def score_edges(scores: FloatArray) -> list[float]:
    """Inner edges of the pooled score deciles, strictly increasing.

    numpy's ``inverted_cdf`` quantiles at 0.1, ..., 0.9 (each edge is a calibration score:
    the smallest s with at least that share of rows at or below it), deduplicated, without
    edges at or below the lowest score (the bin below them would be empty by construction).
    Few distinct scores give fewer edges; one distinct score gives none (a single bin).
    """
    if len(scores) == 0:
        return []
    quantiles = np.unique(np.quantile(scores, DECILES, method="inverted_cdf"))
    return [float(e) for e in quantiles[quantiles > scores.min()]]


def score_counts(data: CalibrationData, edges: list[float]) -> npt.NDArray[np.int64]:
    """Rows per (group, bin): bin j is [edge_{j-1}, edge_j), the first open below, the last
    closed above."""
    n_bins = len(edges) + 1
    bins = np.searchsorted(np.asarray(edges, dtype=np.float64), data.scores, side="right")
    cells = data.group_codes.astype(np.int64) * n_bins + bins
    flat = np.bincount(cells, minlength=len(data.group_keys) * n_bins)
    return flat.reshape(len(data.group_keys), n_bins).astype(np.int64)


@dataclass(frozen=True)
class PolicyIdentity:
    name: str
    description: str
    score_meaning: str
    action_label: str
    no_action_label: str
    unknown_groups: Literal["fallback", "refuse"] = "refuse"


def _rate(num: float, den: float) -> float:
    """A promised rate; 0 where its denominator is 0 (``out_of_sample`` shows the 0)."""
    return 0.0 if den <= 0 else min(1.0, max(0.0, num / den))


def build_document(
    prepared: Prepared,
    solution: Solution,
    cross: CrossFitted,
    identity: PolicyIdentity,
    spread: PromiseSpread | None = None,
) -> PolicyDocument:
    """The document: ``solution``'s rules, ``cross``'s promises (same criterion), with the
    promises' bootstrap standard errors from ``spread`` when given."""
    if cross.criterion is not solution.criterion:
        raise ValueError("the cross-fitted counts belong to another criterion")
    settings, data = prepared.settings, prepared.data
    if solution.criterion is Criterion.SINGLE_CUT:
        rule = solution.rules[POOLED_UNIT]
        rules = dict.fromkeys(data.group_keys, rule)
        fallback = Fallback(
            default=rule if identity.unknown_groups == "fallback" else None,
            unknown_groups=identity.unknown_groups,
        )
    else:
        rules = {k: r for k, r in solution.rules.items() if k != DEFAULT_UNIT}
        fallback = Fallback(
            use_parent=any(k not in data.group_keys and k != DEFAULT_UNIT for k in solution.rules),
            default=solution.rules.get(DEFAULT_UNIT),
            unknown_groups=identity.unknown_groups,
        )
    edges = score_edges(data.scores)
    per_bin = score_counts(data, edges)
    groups: dict[str, GroupTarget] = {}
    for g, key in enumerate(data.group_keys):
        counts = cross.group_counts(key)
        negatives = counts.n - counts.positives
        groups[key] = GroupTarget(
            n=counts.n,
            prevalence=_rate(counts.positives, counts.n),
            action_rate=_rate(counts.tp + counts.fp, counts.n),
            tpr=_rate(counts.tp, counts.positives),
            fpr=_rate(counts.fp, negatives),
            out_of_sample=counts,
            standard_errors=None if spread is None else PromiseErrors(**spread.of(key)),
            score_counts=[int(c) for c in per_bin[g]],
            outside_promise=solution.outside_promise.get(key),
        )
    targets = Targets(
        criterion=solution.criterion,
        tolerance=solution.tolerance,
        expected_cost=cross.cost_per_case,
        reference_group=solution.reference_group,
        capacity=solution.capacity,
        folds=cross.folds,
        resamples=None if spread is None else spread.resamples,
        score_edges=edges,
        groups=groups,
    )
    return PolicyDocument(
        name=identity.name,
        description=identity.description,
        score_meaning=identity.score_meaning,
        score_range=settings.score_range,
        action_label=identity.action_label,
        no_action_label=identity.no_action_label,
        favourable=settings.favourable,
        costs=Costs(false_positive=settings.cost_fp, false_negative=settings.cost_fn),
        groups=Groups(attributes=data.attributes, known=data.group_keys, fallback=fallback),
        rules=rules,
        targets=targets,
    )
