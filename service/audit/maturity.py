"""Whether a month's outcomes are complete enough to decide outcome-based checks.

Outcomes arrive weeks after decisions. A month is *mature* once it has ended and either a
share of its observable decisions (those after which the policy says an outcome can be seen)
has an outcome, or a number of days has passed since the month ended, as the version's audit
plan sets. Until then it is *provisional*: checks that need outcomes are ``pending`` unless
the auditor asks for provisional statuses explicitly, and the report says which.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime

from service.audit.realized import CellCounts, Observability
from service.policy.document import AuditPlan


@dataclass(frozen=True, slots=True)
class Maturity:
    mature: bool
    reason: str
    observable: int
    observed: int
    required_share: float
    mature_after: datetime
    """When the waiting period ends, whatever the coverage."""

    @property
    def share(self) -> float | None:
        return None if self.observable == 0 else self.observed / self.observable


def observable(cell: CellCounts, observed_after: Observability) -> int:
    if observed_after == "action":
        return cell.actions
    if observed_after == "no-action":
        return cell.no_actions
    return cell.n


def month_maturity(
    cells: Iterable[tuple[CellCounts, Observability]],
    plan: AuditPlan,
    month_end: datetime,
    mature_after: datetime,
    now: datetime,
) -> Maturity:
    total = observed = 0
    for cell, observed_after in cells:
        total += observable(cell, observed_after)
        observed += cell.observed
    share = plan.maturity_share
    if now < month_end:
        return Maturity(False, "the month has not ended", total, observed, share, mature_after)
    if total and observed / total >= share:
        reason = f"{observed / total:.1%} of observable decisions have an outcome (>= {share:.0%})"
        return Maturity(True, reason, total, observed, share, mature_after)
    if now >= mature_after:
        reason = f"{plan.maturity_days} days have passed since the month ended"
        return Maturity(True, reason, total, observed, share, mature_after)
    have = "no" if not total else f"{observed / total:.1%} of"
    reason = (
        f"{have} observable decisions have an outcome (< {share:.0%}) and the waiting period "
        f"ends {mature_after:%Y-%m-%d}"
    )
    return Maturity(False, reason, total, observed, share, mature_after)
