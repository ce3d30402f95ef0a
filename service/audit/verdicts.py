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

Everything here is pure: counts in, checks out.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from enum import StrEnum

from service.audit.realized import CellCounts, Favourable, Observability, fraction_of, identifiable
from service.audit.version_settings import VersionSettings
from service.policy.document import AuditPlan, Criterion, GroupTarget, PolicyDocument
from service.stats.design_effect import effective_counts
from service.stats.differences import difference_evidence
from service.stats.margins import MarginEvidence
from service.stats.multiplicity import Method, adjust_p_values
from service.stats.one_sample import rate_evidence
from service.stats.proportions import newcombe_difference_interval, wilson_interval_for_rate
from service.stats.ratios import katz_ratio_interval, ratio_floor_evidence

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


def _counts(cell: CellCounts, metric: str, favourable: Favourable) -> tuple[int, int, str, str]:
    num, den = fraction_of(metric, favourable)
    values = cell.all_counts()
    return values[num], values[den], num, den


def _untested(
    metric: str,
    observed_after: Observability,
    context: MonthContext,
    denominators: Sequence[float],
) -> Status | None:
    if not identifiable(metric, observed_after):
        return Status.NOT_IDENTIFIABLE
    if metric in OUTCOME_METRICS and not context.decide_outcomes:
        return Status.PENDING
    if min(denominators) < context.min_count:
        return Status.TOO_FEW
    return None


def _evidence(test: Procedure, e: MarginEvidence) -> Evidence:
    return Evidence(test, e.p_inside, e.p_outside, e.side)


def version_checks(
    version: int,
    document: PolicyDocument,
    cells: Mapping[str, CellCounts],
    settings: VersionSettings,
    context: MonthContext,
) -> list[Check]:
    """Every check of one version, tested where it can be (statuses not yet decided)."""
    if document.targets is None:
        return []
    return [
        *_parity_checks(version, document, cells, settings, context),
        *_four_fifths_checks(version, document, cells, settings, context),
        *_promise_checks(version, document, cells, settings, context),
    ]


def _outside(document: PolicyDocument) -> set[str]:
    targets = document.targets
    assert targets is not None
    return {g for g, t in targets.groups.items() if t.outside_promise}


def _parity_checks(
    version: int,
    document: PolicyDocument,
    cells: Mapping[str, CellCounts],
    settings: VersionSettings,
    context: MonthContext,
) -> list[Check]:
    targets = document.targets
    assert targets is not None
    fav, obs = document.favourable, document.outcome_observed_after
    eps, ref = settings.tolerance, settings.reference_group
    outside = _outside(document)
    checks: list[Check] = []
    if ref is None:
        return checks
    for metric in CRITERION_METRICS[targets.criterion]:
        for g in sorted(cells):
            if g == ref:
                continue
            base = Check(version, CheckKind.PARITY, metric, g, ref, Band(-eps, eps))
            if g in outside:
                checks.append(replace(base, status=Status.OUTSIDE_PROMISE))
                continue
            if ref not in cells:
                checks.append(replace(base, status=Status.TOO_FEW))
                continue
            k1, n1, num, den = _counts(cells[g], metric, fav)
            k2, n2, _, _ = _counts(cells[ref], metric, fav)
            figures = ((g, num), (g, den), (ref, num), (ref, den))
            status = _untested(metric, obs, context, (n1, n2))
            if status is not None:
                checks.append(replace(base, status=status, figures_from=figures))
                continue
            low, high = newcombe_difference_interval(k1, n1, k2, n2)
            evidence = _evidence(
                Procedure.SCORE_DIFFERENCE, difference_evidence(k1, n1, k2, n2, eps)
            )
            checks.append(
                replace(
                    base,
                    estimate=k1 / n1 - k2 / n2,
                    low=low,
                    high=high,
                    evidence=evidence,
                    figures_from=figures,
                )
            )
    return checks


def _four_fifths_checks(
    version: int,
    document: PolicyDocument,
    cells: Mapping[str, CellCounts],
    settings: VersionSettings,
    context: MonthContext,
) -> list[Check]:
    targets = document.targets
    assert targets is not None
    comp = settings.comparator_group
    if targets.criterion is not Criterion.FOUR_FIFTHS or comp is None:
        return []
    fav, obs = document.favourable, document.outcome_observed_after
    outside = _outside(document)
    checks: list[Check] = []
    for g in sorted(cells):
        if g == comp:
            continue
        band = Band(FOUR_FIFTHS_FLOOR, None)
        base = Check(version, CheckKind.FOUR_FIFTHS, "favourable_rate", g, comp, band)
        if g in outside:
            checks.append(replace(base, status=Status.OUTSIDE_PROMISE))
            continue
        if comp not in cells:
            checks.append(replace(base, status=Status.TOO_FEW))
            continue
        k1, n1, num, den = _counts(cells[g], "favourable_rate", fav)
        k2, n2, _, _ = _counts(cells[comp], "favourable_rate", fav)
        figures = ((g, num), (g, den), (comp, num), (comp, den))
        status = _untested("favourable_rate", obs, context, (n1, n2))
        if status is None and k2 == 0:
            status = Status.TOO_FEW  # no favourable decision at all in the comparator
        if status is not None:
            checks.append(replace(base, status=status, figures_from=figures))
            continue
        low, high = katz_ratio_interval(k1, n1, k2, n2)
        evidence = _evidence(
            Procedure.LOG_RATIO, ratio_floor_evidence(k1, n1, k2, n2, FOUR_FIFTHS_FLOOR)
        )
        checks.append(
            replace(
                base,
                estimate=(k1 / n1) / (k2 / n2),
                low=low,
                high=high,
                evidence=evidence,
                figures_from=figures,
            )
        )
    return checks


def _promise_checks(
    version: int,
    document: PolicyDocument,
    cells: Mapping[str, CellCounts],
    settings: VersionSettings,
    context: MonthContext,
) -> list[Check]:
    targets = document.targets
    assert targets is not None
    fav, obs = document.favourable, document.outcome_observed_after
    eps = settings.tolerance
    checks: list[Check] = []
    for g in sorted(targets.groups):
        if g not in cells:
            continue
        target = targets.groups[g]
        for metric in PROMISED_METRICS:
            promised = float(getattr(target, metric))
            base = Check(
                version,
                CheckKind.PROMISE,
                metric,
                g,
                "promised",
                Band(promised - eps, promised + eps),
            )
            k1, n1, num, den = _counts(cells[g], metric, fav)
            own = ((g, num), (g, den))
            calibration = _calibration_fraction(target, metric)
            denominators = (n1,) if calibration is None else (n1, calibration[1])
            status = _untested(metric, obs, context, denominators)
            if status is not None:
                checks.append(replace(base, status=status, figures_from=own))
                continue
            if calibration is None:
                low, high = wilson_interval_for_rate(k1 / n1, n1)
                evidence = _evidence(Procedure.EXACT_BINOMIAL, rate_evidence(k1, n1, promised, eps))
                checks.append(
                    replace(
                        base,
                        estimate=k1 / n1,
                        low=low,
                        high=high,
                        evidence=evidence,
                        figures_from=own,
                    )
                )
                continue
            kc, nc = calibration
            promise = kc / nc
            ke, ne, _ = effective_counts(kc, nc, _standard_error(target, metric))
            procedure = (
                Procedure.SCORE_DIFFERENCE
                if target.standard_errors is None
                else Procedure.SCORE_DIFFERENCE_WIDENED
            )
            d_low, d_high = newcombe_difference_interval(k1, n1, ke, ne)
            evidence = _evidence(procedure, difference_evidence(k1, n1, ke, ne, eps))
            # The estimate is the realized rate; its interval is the promise plus the Newcombe
            # interval of (realized - promised), so both samples' uncertainty shows.
            checks.append(
                replace(
                    base,
                    band=Band(promise - eps, promise + eps),
                    estimate=k1 / n1,
                    low=promise + d_low,
                    high=promise + d_high,
                    evidence=evidence,
                    figures_from=own,
                )
            )
    return checks


def _calibration_fraction(target: GroupTarget, metric: str) -> tuple[float, float] | None:
    """(count, denominator) of ``metric`` in the version's out-of-sample calibration counts."""
    c = target.out_of_sample
    if c is None:
        return None
    if metric == "action_rate":
        k, n = c.tp + c.fp, float(c.n)
    elif metric == "tpr":
        k, n = c.tp, float(c.positives)
    elif metric == "fpr":
        k, n = c.fp, float(c.n - c.positives)
    else:
        raise ValueError(f"no calibration fraction for {metric!r}")
    return min(k, n), n  # sums of probabilities may pass n by rounding


def _standard_error(target: GroupTarget, metric: str) -> float | None:
    """The promise's bootstrap standard error for ``metric``, if the version stores one."""
    errors = target.standard_errors
    return None if errors is None else getattr(errors, metric)


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
