"""Warnings before outcomes arrive: one day's score distribution and action rates per group.

Outcomes come 30 days or more after a decision; the scores and the actions are known at once.
For one day and each version that decided cases:

- **Score drift.** Each group's day of scores, binned at the version's calibration deciles
  (``targets.score_edges``), against the group's calibration bins (``score_counts``): the exact
  conditional Monte Carlo homogeneity test of the two samples (``homogeneity_mc_test``,
  :mod:`service.stats.drift`: the day's bins as a draw without replacement from the pooled
  table, sequential Monte Carlo p-value). The warning (status ``drift``) comes from the test
  alone. The population stability index is shown beside it as a description (0.1 and 0.25 are
  the common-practice thresholds of a moderate and a major shift); it is no gate, since at 20 to
  50 cases it is above 0.1 on most days by chance (its chance value is about (bins - 1) / n).
- **Action rates.** Each group's action rate against the version's promise for it (and, under
  demographic parity, its gap to the reference group), with the same tests as the monthly
  checks (:mod:`service.audit.verdicts`).

Every test of the day forms one family, adjusted by the version's method (Holm by default), at
level ``level / 365``: by Bonferroni over the days of a year, the chance of any false warning in
a policy-year is at most the audit plan's level. Each drift test draws up to
``ceil(2 m / (level / 365))`` tables for ``m`` tests in the day, so its smallest p-value is half
the family's strictest threshold. Its draws are seeded from ``seed`` (the caller's: the policy
and the day), the version and the group, so re-running a day gives the same p-values.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from service.audit.realized import CellCounts
from service.audit.verdicts import Check, MonthContext
from service.audit.version_checks import version_checks
from service.audit.version_settings import VersionSettings, strictest_plan
from service.policy.document import PolicyDocument
from service.stats.drift import homogeneity_mc_test, population_stability_index
from service.stats.multiplicity import adjust_p_values

DAYS_PER_YEAR = 365
DRAWS_PER_THRESHOLD = 2
"""A drift test's smallest p-value is 1 / DRAWS_PER_THRESHOLD of the day's strictest threshold."""


def text_seed(text: str) -> int:
    """A 128-bit seed from a text (SHA-256), e.g. a policy name and a day."""
    return int.from_bytes(hashlib.sha256(text.encode("utf-8")).digest()[:16], "big")


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
    draws: int | None
    status: str  # "drift", "no-evidence", "too-few", "no-baseline"


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
        return sum(r.status == "drift" for r in self.drift) + sum(a.warning for a in self.actions)


def day_warnings(
    days: Sequence[DayCounts], min_count: int = 20, seed: Sequence[int] = (0,)
) -> DayWarnings:
    """The day's drift and action-rate warnings across the versions that decided cases;
    ``seed`` (non-negative integers) seeds the drift tests' draws."""
    plan = strictest_plan([d.settings.plan for d in days])
    level = plan.level / DAYS_PER_YEAR

    # (version, group, cases, baseline, current, status); status "" means tested.
    drift_inputs: list[tuple[int, str, int, Sequence[int], Sequence[int], str]] = []
    for d in days:
        targets = d.document.targets
        for g in sorted(d.cells):
            n = d.cells[g].n
            baseline = None
            if targets is not None and targets.score_edges is not None and g in targets.groups:
                baseline = targets.groups[g].score_counts
            current = d.score_bins.get(g)
            if baseline is None or current is None or sum(baseline) == 0:
                drift_inputs.append((d.version, g, n, [], [], "no-baseline"))
            elif n < min_count:
                drift_inputs.append((d.version, g, n, [], [], "too-few"))
            else:
                drift_inputs.append((d.version, g, n, baseline, current, ""))

    context = MonthContext(min_count=min_count, decide_outcomes=False)
    action_checks: list[tuple[int, Check]] = []
    for d in days:
        for c in version_checks(d.version, d.document, d.cells, d.settings, context):
            if c.metric == "action_rate":
                action_checks.append((d.version, c))
    action_p = [c.evidence.p_outside for _, c in action_checks if c.evidence is not None]

    tests = sum(not x[5] for x in drift_inputs) + len(action_p)
    max_draws = math.ceil(DRAWS_PER_THRESHOLD * max(tests, 1) / level)
    measured: list[tuple[float, float, int]] = []  # (psi, p-value, draws) of the tested groups
    for version, g, _, base, cur, status in drift_inputs:
        if status:
            continue
        test = homogeneity_mc_test(
            base, cur, max_draws=max_draws, seed=[*seed, version, text_seed(g)]
        )
        psi = population_stability_index(base, cur)
        measured.append((psi, test.p_value, test.draws))

    raw = [p for _, p, _ in measured] + action_p
    adjusted = iter(adjust_p_values(raw, plan.multiplicity))
    tested = iter(measured)

    drift: list[DriftRow] = []
    for version, g, n, _, _, status in drift_inputs:
        if status:
            drift.append(DriftRow(version, g, n, None, None, None, None, status))
            continue
        psi, p_value, draws = next(tested)
        padj = next(adjusted)
        verdict = "drift" if padj <= level else "no-evidence"
        drift.append(DriftRow(version, g, n, psi, p_value, padj, draws, verdict))
    actions: list[ActionRow] = []
    for version, c in action_checks:
        if c.evidence is None:
            actions.append(ActionRow(version, c, None, False))
            continue
        p_action = next(adjusted)
        actions.append(ActionRow(version, c, p_action, p_action <= level))
    return DayWarnings(level, len(raw), drift, actions)
