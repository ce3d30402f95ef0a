"""The published shape of one day's warnings (API and CLI)."""

from __future__ import annotations

from datetime import date

from pydantic import BaseModel, ConfigDict

from service.audit.check_rows import what_is_checked
from service.audit.early_warning import DayWarnings
from service.audit.suppression import SMALL_CELL_LIMIT

DESCRIPTION = (
    "Score drift: each group's scores of the day, binned at the version's calibration deciles, "
    "against its calibration bins, by an exact conditional Monte Carlo homogeneity test (the "
    "day's bins as a draw without replacement from the pooled table; sequential Monte Carlo "
    "p-value, Besag and Clifford 1991); 'drift' comes from the test alone. The population "
    "stability index is shown beside it as a description (0.1 moderate, 0.25 major: "
    "common-practice thresholds), not as a gate. Action rates: each group's action rate against "
    "the version's promise (and, under demographic parity, its gap to the reference group), "
    "with the monthly checks' tests. All tests of the day form one family adjusted by the audit "
    "plan's method at level/365, so the chance of any false warning in a policy-year is at most "
    "the level."
)


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class DriftItem(_Model):
    version: int
    group: str
    cases: int | str
    psi: float | None
    p_value: float | None
    p_adjusted: float | None
    draws: int | None
    status: str


class ActionItem(_Model):
    version: int
    check: str
    group: str
    against: str
    estimate: float | None
    p_outside: float | None
    p_adjusted: float | None
    status: str
    message: str


class DayWarningsBody(_Model):
    policy: str
    day: str
    time_zone: str
    level: float
    tests: int
    warnings: int
    description: str
    drift: list[DriftItem]
    action_rates: list[ActionItem]


def _cases(n: int) -> int | str:
    return "<11" if 0 < n < SMALL_CELL_LIMIT else n


def warnings_body(policy: str, day: date, time_zone: str, w: DayWarnings) -> DayWarningsBody:
    """The day's warnings as published: a group of 1 to 10 cases shows no figures."""
    drift = []
    for r in w.drift:
        small = 0 < r.cases < SMALL_CELL_LIMIT
        drift.append(
            DriftItem(
                version=r.version,
                group=r.group,
                cases=_cases(r.cases),
                psi=None if small else r.psi,
                p_value=None if small else r.p_value,
                p_adjusted=None if small else r.p_adjusted,
                draws=None if small else r.draws,
                status=r.status,
            )
        )
    actions = []
    for a in w.actions:
        c = a.check
        status = (
            "warning" if a.warning else ("not-tested" if a.p_adjusted is None else "no-evidence")
        )
        actions.append(
            ActionItem(
                version=a.version,
                check=c.kind.value,
                group=c.group,
                against=c.against,
                estimate=c.estimate,
                p_outside=None if c.evidence is None else c.evidence.p_outside,
                p_adjusted=a.p_adjusted,
                status=status,
                message=f"{what_is_checked(c)}: {status}",
            )
        )
    return DayWarningsBody(
        policy=policy,
        day=day.isoformat(),
        time_zone=time_zone,
        level=w.level,
        tests=w.tests,
        warnings=w.warnings,
        description=DESCRIPTION,
        drift=drift,
        action_rates=actions,
    )
