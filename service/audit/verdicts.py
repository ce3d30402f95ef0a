"""Monthly verdicts: every status is the outcome of a named test, controlled over the month.

A *check* compares one quantity with the band a policy version promised for it:

- ``parity``: a group's rate minus the reference group's, for each rate the version's criterion
  bounds (equal opportunity: TPR; predictive equality: FPR; equalized odds: both; demographic
  parity: action rate); band ``[-eps, +eps]``.
- ``four-fifths``: a group's favourable rate divided by the comparator group's, for versions
  derived under the four-fifths criterion; band ``[0.8, inf)`` (29 CFR 1607.4(D)).
- ``promise``: a group's realized action rate, TPR and FPR minus the rates the version promised
  for it; band ``[-eps, +eps]``. With out-of-sample calibration counts stored in the version the
  promise is a second sample; without them it is taken as an exact number. With bootstrap
  standard errors of the promise too (``standard_errors``), that second sample counts as its
  effective size: its denominator divided by the design effect, the bootstrap variance over
  the binomial one, at least 1 (Rao & Scott 1992, Biometrics 48:577-585), so the spread a
  cross-fitted promise has beyond a binomial proportion widens the test.

Each tested check has two p-values (``service.stats``): one whose rejection shows the quantity
INSIDE its band (two one-sided tests, Schuirmann 1987) and one whose rejection shows it OUTSIDE
(the smaller one-sided p-value at the nearer edge, doubled for the two directions; one-sided
for four-fifths). Differences of two proportions use the Miettinen-Nurminen score test, a rate
against a fixed number exact binomial tests, the four-fifths ratio the log (Katz) test.

All checks of one policy in one month form the family. The outside p-values are adjusted
together (Holm 1979, or Benjamini & Yekutieli 2001, as the version's audit plan says), and so
are the inside p-values; then ``breach`` iff the adjusted outside p-value is at most the level,
``holds`` iff the adjusted inside p-value is, and otherwise ``undecided``: neither shown.
Checks that are not tested carry a status saying why: ``too-few`` (a denominator below the
minimum count), ``not-identifiable`` (selective labels), ``pending`` (the month's outcomes are
not mature yet), ``outside-promise`` (the version recorded at approval that the criterion does
not cover this group).

The checks of a version are made in :mod:`service.audit.version_checks`; this module holds
their types and :func:`decide`. Everything here is pure: counts in, checks out.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from enum import StrEnum

from service.policy.document import AuditPlan
from service.policy.targets import Criterion
from service.stats.multiplicity import Method, adjust_p_values

FOUR_FIFTHS_FLOOR = 0.8
DEFAULT_MIN_COUNT = 20
"""Smallest denominator a check is tested on. Common practice, after the CDC's habit of
flagging rates built on fewer than 20 events as unstable."""

CRITERION_METRICS: dict[Criterion, tuple[str, ...]] = {
    Criterion.MAX_UTILITY: (),
    Criterion.SINGLE_CUT: (),
    Criterion.DEMOGRAPHIC_PARITY: ("action_rate",),
    Criterion.EQUAL_OPPORTUNITY: ("tpr",),
    Criterion.PREDICTIVE_EQUALITY: ("fpr",),
    Criterion.EQUALIZED_ODDS: ("tpr", "fpr"),
    Criterion.FOUR_FIFTHS: (),
}
"""The rates whose gaps to the reference group each criterion bounds by its tolerance."""

PROMISED_METRICS = ("action_rate", "tpr", "fpr")
OUTCOME_METRICS = frozenset({"prevalence", "tpr", "fpr", "fnr", "ppv", "npv"})
"""Rates that need outcomes: undecided (``pending``) while a month is not mature."""


class Status(StrEnum):
    BREACH = "breach"
    UNDECIDED = "undecided"
    HOLDS = "holds"
    TOO_FEW = "too-few"
    NOT_IDENTIFIABLE = "not-identifiable"
    PENDING = "pending"
    OUTSIDE_PROMISE = "outside-promise"


class CheckKind(StrEnum):
    PARITY = "parity"
    FOUR_FIFTHS = "four-fifths"
    PROMISE = "promise"
    CALIBRATION = "calibration"


class Procedure(StrEnum):
    SCORE_DIFFERENCE = "score-difference"
    SCORE_DIFFERENCE_WIDENED = "score-difference-widened"
    EXACT_BINOMIAL = "exact-binomial"
    LOG_RATIO = "log-ratio"


PROCEDURES: dict[Procedure, str] = {
    Procedure.SCORE_DIFFERENCE: (
        "difference of two proportions: Miettinen-Nurminen score tests (Miettinen & Nurminen "
        "1985) against the edges of the tolerance band"
    ),
    Procedure.SCORE_DIFFERENCE_WIDENED: (
        "realized minus a cross-fitted promise with a bootstrap standard error: "
        "Miettinen-Nurminen score tests against the edges of the tolerance band, the promise "
        "counted as a binomial sample of its effective size, its out-of-sample denominator "
        "divided by its design effect (Rao & Scott 1992)"
    ),
    Procedure.EXACT_BINOMIAL: (
        "one proportion against a fixed promised rate: exact binomial tests against the edges "
        "of the tolerance band"
    ),
    Procedure.LOG_RATIO: (
        "ratio of two proportions: log-ratio z tests with the Katz standard error (Katz, "
        "Baptista, Azen & Pike 1978) against the four-fifths line"
    ),
}


@dataclass(frozen=True, slots=True)
class Band:
    """The promised band of a check's quantity; ``high`` None means unbounded above."""

    low: float
    high: float | None


@dataclass(frozen=True, slots=True)
class Evidence:
    procedure: Procedure
    p_inside: float
    p_outside: float
    side: str
    p_inside_adjusted: float | None = None
    p_outside_adjusted: float | None = None


@dataclass(frozen=True, slots=True)
class Check:
    """One check of one version in one month, with its (true, unsuppressed) figures."""

    version: int
    kind: CheckKind
    metric: str
    group: str
    against: str
    band: Band
    status: Status = Status.UNDECIDED
    estimate: float | None = None
    low: float | None = None
    high: float | None = None
    """The descriptive 95% interval of the estimate (not adjusted for multiplicity)."""
    evidence: Evidence | None = None
    figures_from: tuple[tuple[str, str], ...] = ()
    """(group, count name) pairs the figures are computed from, for small-cell suppression."""

    @property
    def key(self) -> str:
        return f"v{self.version}/{self.kind.value}/{self.metric}/{self.group}"


@dataclass(frozen=True, slots=True)
class MonthContext:
    min_count: int
    decide_outcomes: bool
    """False while the month is not mature (outcome-based checks are then ``pending``)."""


@dataclass(frozen=True, slots=True)
class Family:
    method: Method
    level: float
    tests: int


def decide(checks: Sequence[Check], plan: AuditPlan) -> tuple[list[Check], Family]:
    """Adjust the family's p-values and give every tested check its status."""
    tested = [i for i, c in enumerate(checks) if c.evidence is not None]
    method: Method = plan.multiplicity
    outside = adjust_p_values([_ev(checks[i]).p_outside for i in tested], method)
    inside = adjust_p_values([_ev(checks[i]).p_inside for i in tested], method)
    out = list(checks)
    for j, i in enumerate(tested):
        ev = replace(_ev(checks[i]), p_outside_adjusted=outside[j], p_inside_adjusted=inside[j])
        if outside[j] <= plan.level:
            status = Status.BREACH
        elif inside[j] <= plan.level:
            status = Status.HOLDS
        else:
            status = Status.UNDECIDED
        out[i] = replace(checks[i], evidence=ev, status=status)
    return out, Family(method, plan.level, len(tested))


def _ev(check: Check) -> Evidence:
    assert check.evidence is not None
    return check.evidence
