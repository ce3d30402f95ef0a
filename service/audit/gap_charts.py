"""Charts of a group's gap (or ratio) to the reference group across months.

For each version, group and rate the version's criterion bounds, two one-sided Bernoulli CUSUM
charts (Reynolds & Stoumbos 1999) run over the group's cases, month by month: the "above"
chart weighs a gap of ``+2 eps`` against ``+eps`` (the edge of the promise), the "below" chart
``-2 eps`` against ``-eps``, with the reference group's realized rate of the same month as the
base. Under the four-fifths criterion one chart weighs a ratio of ``0.8 - 2 eps`` against 0.8.
A chart drifts upward only when the gap is beyond the tolerance. Each limit is designed on one
month's increment at the edge, mixed over the reference's sampling spread (its realized rate
is the base), at the group's and the reference's mean monthly volumes.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.audit.charts import STEP_POINTS, ChartSide, chart_side, clip, limit_for
from service.audit.monitoring_types import MonthCounts, MonthEstimate
from service.audit.realized import Favourable, fraction_of
from service.audit.verdicts import FOUR_FIFTHS_FLOOR, OUTCOME_METRICS, CheckKind
from service.stats.cusum import (
    StepDistribution,
    binomial_llr,
    binomial_step_distribution,
    coarsened,
    mixture,
)
from service.stats.distributions import binom_pmf
from service.stats.pooling import PooledDifference, mantel_haenszel_difference
from service.stats.proportions import newcombe_difference_interval
from service.stats.ratios import katz_ratio_interval
from service.stats.trend import Trend, weighted_trend


@dataclass(frozen=True, slots=True)
class Series:
    """Per month: (k, n) of the group and (k, n) of the reference, for months with both."""

    months: tuple[str, ...]
    group: tuple[tuple[int, int], ...]
    reference: tuple[tuple[int, int], ...]


def series_of(
    history: Sequence[MonthCounts], g: str, ref: str, metric: str, fav: Favourable
) -> Series:
    months: list[str] = []
    group: list[tuple[int, int]] = []
    reference: list[tuple[int, int]] = []
    for m in history:
        if metric in OUTCOME_METRICS and not m.mature:
            continue
        if g not in m.cells or ref not in m.cells:
            continue
        num, den = fraction_of(metric, fav)
        kg, ng = m.cells[g].all_counts()[num], m.cells[g].all_counts()[den]
        kr, nr = m.cells[ref].all_counts()[num], m.cells[ref].all_counts()[den]
        if ng == 0 or nr == 0:
            continue
        months.append(str(m.month))
        group.append((kg, ng))
        reference.append((kr, nr))
    return Series(tuple(months), tuple(group), tuple(reference))


@dataclass(frozen=True, slots=True)
class Design:
    """How one chart side turns the reference rate ``r`` into its two models."""

    side: str
    in_control: float
    out_of_control: float
    ratio: bool

    def shifted(self, r: float, by: float) -> float:
        return by * r if self.ratio else r + by

    def rates(self, r: float) -> tuple[float, float] | None:
        p0 = clip(self.shifted(r, self.in_control))
        p1 = clip(self.shifted(r, self.out_of_control))
        return None if p0 == p1 else (p0, p1)


REFERENCE_POINTS = 41
"""Values of the reference's monthly rate the in-control increment is mixed over."""


def in_control_step(design: Design, n: int, n_ref: int, r: float) -> StepDistribution:
    """One month's increment at the edge of the promise, with the chart's base (the
    reference's realized rate) as random as it is: the group's count is Binomial(n, edge(r))
    and the base is Binomial(n_ref, r) / n_ref, independent. Without the base's spread the
    limit would be designed too low and the chart would signal falsely several times as often
    as designed when the reference group is not much larger than the group."""
    k = np.arange(n_ref + 1)
    pmf = binom_pmf(k, n_ref, r)
    keep = pmf >= 1e-12
    k, pmf = k[keep], pmf[keep]
    # Pool the reference's values into at most REFERENCE_POINTS groups of equal probability,
    # each at its probability-weighted mean rate.
    edges = np.searchsorted(
        np.cumsum(pmf) / pmf.sum(), np.linspace(0, 1, REFERENCE_POINTS + 1)[1:-1]
    )
    components, weights = [], []
    for part_k, part_p in zip(np.split(k, edges), np.split(pmf, edges), strict=True):
        if part_p.size == 0 or part_p.sum() <= 0:
            continue
        base = float(part_k @ part_p / part_p.sum()) / n_ref
        rates = design.rates(base)
        truth = clip(design.shifted(r, design.in_control))
        if rates is None:
            step = StepDistribution(np.zeros(1), np.ones(1))
        else:
            step = coarsened(binomial_step_distribution(n, truth, *rates), STEP_POINTS)
        components.append(step)
        weights.append(float(part_p.sum()))
    return mixture(components, weights)


def designs(kind: CheckKind, eps: float) -> tuple[Design, ...]:
    if kind is CheckKind.FOUR_FIFTHS:
        return (Design("below", FOUR_FIFTHS_FLOOR, FOUR_FIFTHS_FLOOR - 2 * eps, True),)
    return (Design("above", eps, 2 * eps, False), Design("below", -eps, -2 * eps, False))


def gap_side(design: Design, series: Series, false_alarm: float) -> ChartSide | None:
    increments: list[float] = []
    for (kg, ng), (kr, nr) in zip(series.group, series.reference, strict=True):
        rates = design.rates(kr / nr)
        increments.append(0.0 if rates is None else binomial_llr(kg, ng, *rates))
    months = len(series.group)
    mean_n = max(1, round(sum(n for _, n in series.group) / months))
    mean_n_ref = max(1, round(sum(n for _, n in series.reference) / months))
    mean_r = sum(k for k, _ in series.reference) / sum(n for _, n in series.reference)
    if design.rates(mean_r) is None:
        return None
    limit = limit_for(in_control_step(design, mean_n, mean_n_ref, mean_r), false_alarm)
    return chart_side(
        design.side, design.in_control, design.out_of_control, increments, series.months, limit
    )


def estimates_of(kind: CheckKind, series: Series) -> tuple[MonthEstimate, ...]:
    out = []
    for month, (kg, ng), (kr, nr) in zip(
        series.months, series.group, series.reference, strict=True
    ):
        if kind is CheckKind.FOUR_FIFTHS:
            if kr == 0:
                continue
            low, high = katz_ratio_interval(kg, ng, kr, nr)
            out.append(MonthEstimate(month, (kg / ng) / (kr / nr), low, high))
        else:
            low, high = newcombe_difference_interval(kg, ng, kr, nr)
            out.append(MonthEstimate(month, kg / ng - kr / nr, low, high))
    return tuple(out)


def pooled_and_trend(series: Series) -> tuple[PooledDifference | None, Trend | None]:
    strata = [
        (kg, ng, kr, nr) for (kg, ng), (kr, nr) in zip(series.group, series.reference, strict=True)
    ]
    pooled = mantel_haenszel_difference(strata)
    if len(strata) < 3:
        return pooled, None
    estimates, variances = [], []
    for kg, ng, kr, nr in strata:
        estimates.append(kg / ng - kr / nr)
        # Variances with half a case added to each cell, so a month at 0% or 100% still
        # has a positive one (common practice).
        pg, pr = (kg + 0.5) / (ng + 1), (kr + 0.5) / (nr + 1)
        variances.append(pg * (1 - pg) / (ng + 1) + pr * (1 - pr) / (nr + 1))
    try:
        trend = weighted_trend(list(range(len(strata))), estimates, variances)
    except ValueError:
        trend = None
    return pooled, trend
