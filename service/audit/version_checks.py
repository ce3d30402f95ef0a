"""The checks of one policy version in one month, before the family is decided: parity,
four-fifths and promise checks (see :mod:`service.audit.verdicts` for what each compares and
how statuses are decided), each tested where its counts allow, or given the status that says
why not. Pure: counts in, checks out.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace

from service.audit.realized import CellCounts, Favourable, Observability, fraction_of, identifiable
from service.audit.verdicts import (
    CRITERION_METRICS,
    FOUR_FIFTHS_FLOOR,
    OUTCOME_METRICS,
    PROMISED_METRICS,
    Band,
    Check,
    CheckKind,
    Evidence,
    MonthContext,
    Procedure,
    Status,
)
from service.audit.version_settings import VersionSettings
from service.policy.document import PolicyDocument
from service.policy.targets import Criterion, GroupTarget
from service.stats.design_effect import effective_counts
from service.stats.differences import difference_evidence
from service.stats.margins import MarginEvidence
from service.stats.one_sample import rate_evidence
from service.stats.proportions import newcombe_difference_interval, wilson_interval_for_rate
from service.stats.ratios import katz_ratio_interval, ratio_floor_evidence


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
