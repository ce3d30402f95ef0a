"""Warnings before outcomes arrive: one day's score distribution and action rates per group.

Outcomes come 30 days or more after a decision; the scores and the actions are known at once.
For one day and each version that decided cases:

- **Score drift.** Each group's day of scores, binned at the version's calibration deciles
  (``targets.score_edges``), against the group's calibration bins (``score_counts``): the
  population stability index (0.1 and 0.25 are the common-practice thresholds for a moderate
  and a major shift) and Pearson's homogeneity test of the two samples. A drift warning needs
  both: the index at or above 0.1 AND the test rejecting. The index alone fires by chance most
  days in small groups (its chance value is about (bins - 1) / n).
- **Action rates.** Each group's action rate against the version's promise for it (and, under
  demographic parity, its gap to the reference group), with the same tests as the monthly
  checks (:mod:`service.audit.verdicts`).

Every test of the day forms one family, adjusted by the version's method, at level
``level / 365``: by Bonferroni over the days of a year, the chance of any false warning in a
policy-year is at most the audit plan's level.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from service.audit.realized import CellCounts
from service.audit.verdicts import Check, MonthContext, version_checks
from service.audit.version_settings import VersionSettings, strictest_plan
from service.policy.document import PolicyDocument
from service.stats.drift import (
    PSI_MAJOR,
    PSI_MODERATE,
    homogeneity_test,
    population_stability_index,
)
from service.stats.multiplicity import adjust_p_values

DAYS_PER_YEAR = 365


@dataclass(frozen=True, slots=True)
class DayCounts:
    """One version's decisions of one day: cells (cases, actions) and score bin counts."""

    version: int
    document: PolicyDocument
    settings: VersionSettings
    cells: Mapping[str, CellCounts]
    score_bins: Mapping[str, Sequence[int]]


@dataclass(frozen=True, slots=True)
class DriftRow:
    version: int
    group: str
    cases: int
    psi: float | None
    p_value: float | None
    p_adjusted: float | None
    status: str  # "major-drift", "moderate-drift", "no-evidence", "too-few", "no-baseline"


@dataclass(frozen=True, slots=True)
class ActionRow:
    version: int
    check: Check
    p_adjusted: float | None
    warning: bool


@dataclass(frozen=True, slots=True)
class DayWarnings:
    level: float
    tests: int
    drift: list[DriftRow]
    actions: list[ActionRow]

    @property
    def warnings(self) -> int:
        return sum(r.status.endswith("drift") for r in self.drift) + sum(
            a.warning for a in self.actions
        )


def day_warnings(days: Sequence[DayCounts], min_count: int = 20) -> DayWarnings:
    """The day's drift and action-rate warnings across the versions that decided cases."""
    plan = strictest_plan([d.settings.plan for d in days])
    level = plan.level / DAYS_PER_YEAR

    drift_inputs: list[tuple[int, str, int, float | None, float | None, str]] = []
    for d in days:
        targets = d.document.targets
        for g in sorted(d.cells):
            n = d.cells[g].n
            baseline = None
            if targets is not None and targets.score_edges is not None and g in targets.groups:
                baseline = targets.groups[g].score_counts
            current = d.score_bins.get(g)
            if baseline is None or current is None or sum(baseline) == 0:
                drift_inputs.append((d.version, g, n, None, None, "no-baseline"))
                continue
            if n < min_count:
                drift_inputs.append((d.version, g, n, None, None, "too-few"))
                continue
            index = population_stability_index(baseline, current)
            test = homogeneity_test(baseline, current)
            drift_inputs.append((d.version, g, n, index, test.p_value, ""))

    context = MonthContext(min_count=min_count, decide_outcomes=False)
    action_checks: list[tuple[int, Check]] = []
    for d in days:
        for c in version_checks(d.version, d.document, d.cells, d.settings, context):
            if c.metric == "action_rate":
                action_checks.append((d.version, c))

    raw = [x[4] for x in drift_inputs if x[4] is not None and not x[5]]
    raw += [c.evidence.p_outside for _, c in action_checks if c.evidence is not None]
    adjusted = iter(adjust_p_values(raw, plan.multiplicity))

    drift: list[DriftRow] = []
    for version, g, n, psi, p_value, status in drift_inputs:
        if p_value is None or status:
            drift.append(DriftRow(version, g, n, psi, p_value, None, status))
            continue
        padj = next(adjusted)
        assert psi is not None
        if padj <= level and psi >= PSI_MAJOR:
            verdict = "major-drift"
        elif padj <= level and psi >= PSI_MODERATE:
            verdict = "moderate-drift"
        else:
            verdict = "no-evidence"
        drift.append(DriftRow(version, g, n, psi, p_value, padj, verdict))
    actions: list[ActionRow] = []
    for version, c in action_checks:
        if c.evidence is None:
            actions.append(ActionRow(version, c, None, False))
            continue
        p_action = next(adjusted)
        actions.append(ActionRow(version, c, p_action, p_action <= level))
    return DayWarnings(level, len(raw), drift, actions)
