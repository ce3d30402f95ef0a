"""Evidence across months: cumulative-sum charts, pooled gaps and trends, per version.

One month at a time cannot see a slow drift: a gap of twice the tolerance in a mid-size group
is rarely significant in any single month once the month's family of checks is adjusted. A
cumulative sum of log-likelihood ratios sees it within months (Page 1954).

For each version, group and rate the version's criterion bounds, two one-sided Bernoulli CUSUM
charts (Reynolds & Stoumbos 1999) run over the group's cases, month by month: the "above"
chart weighs a gap of ``+2 eps`` against ``+eps`` (the edge of the promise), the "below" chart
``-2 eps`` against ``-eps``, with the reference group's realized rate of the same month as the
base (the in-control probability of a case moves with it, as a case's risk does in Steiner et
al. 2000). Under the four-fifths criterion one chart weighs a ratio of ``0.8 - 2 eps`` against
0.8. So a chart can only drift upward when the gap is beyond the tolerance: a policy that keeps
its promise, even at the edge of it, raises false signals at the designed rate only.

Control limits: every chart of a version gets the limit ``h`` whose probability of a false
signal within :data:`HORIZON` months is at most ``level / K`` at the edge of the promise,
``K`` the number of charts of the version (Bonferroni), computed with the Markov chain of Brook
& Evans (1972) at the group's and the reference's mean monthly volumes, the month's increment
mixed over the reference's sampling spread (its realized rate is the base). So the chance that
any chart of a version signals falsely within a year is at most the audit plan's level.

Where the score is a probability (score range [0, 1]), two risk-adjusted Bernoulli CUSUM
charts per group (Steiner, Cook, Farewell & Treasure 2000) weigh the outcomes against the
scores themselves: odds of the outcome doubled (above) or halved (below) against the odds the
score states. They watch the model's calibration drifting within a group, the most common
reason for a rate to drift; their limits come from the same chain, with the month's increment
distribution computed from the group's score bins, and they count among the version's charts.

Months whose outcomes are not mature are left out of charts of outcome-based rates. The pooled
gap over the charted months (Mantel & Haenszel, with Sato's variance) and a weighted trend test
of the monthly gaps go with each pair of gap charts as descriptive figures.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import binom

from service.audit.month import Month
from service.audit.realized import CellCounts, Favourable, ScoreSums, fraction_of
from service.audit.verdicts import (
    CRITERION_METRICS,
    FOUR_FIFTHS_FLOOR,
    OUTCOME_METRICS,
    CheckKind,
    VersionSettings,
)
from service.policy.document import Criterion, PolicyDocument
from service.stats.cusum import (
    CONTROL_LIMIT_FLOOR,
    StepDistribution,
    binomial_llr,
    binomial_step_distribution,
    coarsened,
    control_limit,
    cusum_path,
    mixture,
    risk_adjusted_llr,
    risk_adjusted_step_distribution,
)
from service.stats.pooling import PooledDifference, mantel_haenszel_difference
from service.stats.proportions import Z95, newcombe_difference_interval
from service.stats.ratios import katz_ratio_interval
from service.stats.trend import Trend, weighted_trend

HORIZON = 12
"""Months over which each version's false-signal probability is bounded by the level."""
WINDOW = 24
"""Months of history the charts look back over (the latest snapshot of each)."""
STATES = 60
"""Grid points of the Markov chain."""
STEP_POINTS = 201
"""Support points a month's increment distribution is coarsened to (mean kept exactly)."""
DISCRETISATION_MARGIN = 0.9
"""Limits are designed for 90% of their share of the level. With 60 states and 201 points the
false-signal probability of a limit, recomputed with a 200-state chain and 401 points, was
within 7% of its design in every case measured (tests/test_monitoring.py), so the margin keeps
every chart under its share."""
_EDGE = 1e-4
"""Design probabilities are kept inside [_EDGE, 1 - _EDGE]."""


@dataclass(frozen=True, slots=True)
class MonthCounts:
    """One month of one version: its cells, whether its outcomes were mature, and the score
    sums of each group's cases with an outcome (for the risk-adjusted charts)."""

    month: Month
    mature: bool
    cells: Mapping[str, CellCounts]
    scores: Mapping[str, ScoreSums] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class ChartSide:
    side: str  # "above" or "below"
    in_control: float
    out_of_control: float
    """The gap (or ratio) the chart's in-control and out-of-control models assume."""
    limit: float
    path: tuple[float, ...]
    signal: bool
    first_signal: str | None

    @property
    def statistic(self) -> float:
        return self.path[-1] if self.path else 0.0


@dataclass(frozen=True, slots=True)
class MonthEstimate:
    """The charted quantity in one month with its 95% interval (descriptive)."""

    month: str
    value: float
    low: float
    high: float


@dataclass(frozen=True, slots=True)
class Monitor:
    """The charts of one (version, check, rate, group) over the months that count."""

    version: int
    kind: CheckKind
    metric: str
    group: str
    against: str
    months: tuple[str, ...]
    sides: tuple[ChartSide, ...]
    estimates: tuple[MonthEstimate, ...]
    pooled: PooledDifference | None
    trend: Trend | None
    figures_from: tuple[tuple[str, str], ...]

    @property
    def signal(self) -> bool:
        return any(s.signal for s in self.sides)


@dataclass(frozen=True, slots=True)
class _Series:
    """Per month: (k, n) of the group and (k, n) of the reference, for months with both."""

    months: tuple[str, ...]
    group: tuple[tuple[int, int], ...]
    reference: tuple[tuple[int, int], ...]


def _series(
    history: Sequence[MonthCounts], g: str, ref: str, metric: str, fav: Favourable
) -> _Series:
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
    return _Series(tuple(months), tuple(group), tuple(reference))


def _clip(p: float) -> float:
    return min(1.0 - _EDGE, max(_EDGE, p))


@dataclass(frozen=True, slots=True)
class _Design:
    """How one chart side turns the reference rate ``r`` into its two models."""

    side: str
    in_control: float
    out_of_control: float
    ratio: bool

    def shifted(self, r: float, by: float) -> float:
        return by * r if self.ratio else r + by

    def rates(self, r: float) -> tuple[float, float] | None:
        p0 = _clip(self.shifted(r, self.in_control))
        p1 = _clip(self.shifted(r, self.out_of_control))
        return None if p0 == p1 else (p0, p1)


REFERENCE_POINTS = 41
"""Values of the reference's monthly rate the in-control increment is mixed over."""


def _in_control_step(design: _Design, n: int, n_ref: int, r: float) -> StepDistribution:
    """One month's increment at the edge of the promise, with the chart's base (the
    reference's realized rate) as random as it is: the group's count is Binomial(n, edge(r))
    and the base is Binomial(n_ref, r) / n_ref, independent. Without the base's spread the
    limit would be designed too low and the chart would signal falsely several times as often
    as designed when the reference group is not much larger than the group."""
    k = np.arange(n_ref + 1)
    pmf = binom.pmf(k, n_ref, r)
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
        truth = _clip(design.shifted(r, design.in_control))
        if rates is None:
            step = StepDistribution(np.zeros(1), np.ones(1))
        else:
            step = coarsened(binomial_step_distribution(n, truth, *rates), STEP_POINTS)
        components.append(step)
        weights.append(float(part_p.sum()))
    return mixture(components, weights)


def _designs(kind: CheckKind, eps: float) -> tuple[_Design, ...]:
    if kind is CheckKind.FOUR_FIFTHS:
        return (_Design("below", FOUR_FIFTHS_FLOOR, FOUR_FIFTHS_FLOOR - 2 * eps, True),)
    return (_Design("above", eps, 2 * eps, False), _Design("below", -eps, -2 * eps, False))


def _limit(step: StepDistribution, false_alarm: float) -> float:
    target = false_alarm * DISCRETISATION_MARGIN
    try:
        return control_limit([coarsened(step, STEP_POINTS)], HORIZON, target, STATES)
    except ValueError:
        # In control, no month's increment can be positive (a large volume: the evidence of
        # any one month is decisive). Any positive limit then meets the bound; the smallest
        # signals on the first month whose data favour the out-of-control model.
        return CONTROL_LIMIT_FLOOR


def _chart(
    side: str,
    in_control: float,
    out_of_control: float,
    increments: Sequence[float],
    months: Sequence[str],
    limit: float,
) -> ChartSide:
    path = tuple(cusum_path(increments))
    first = next((m for m, v in zip(months, path, strict=True) if v >= limit), None)
    return ChartSide(side, in_control, out_of_control, limit, path, path[-1] >= limit, first)


def _side(design: _Design, series: _Series, false_alarm: float) -> ChartSide | None:
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
    limit = _limit(_in_control_step(design, mean_n, mean_n_ref, mean_r), false_alarm)
    return _chart(
        design.side, design.in_control, design.out_of_control, increments, series.months, limit
    )


def _estimates(kind: CheckKind, series: _Series) -> tuple[MonthEstimate, ...]:
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


def _pooled_and_trend(series: _Series) -> tuple[PooledDifference | None, Trend | None]:
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


_ODDS = (("above", 2.0), ("below", 0.5))
"""The risk-adjusted charts: odds of the outcome doubled or halved against the score's."""


def _outcome_monitor(
    version: int, g: str, history: Sequence[MonthCounts], false_alarm: float
) -> Monitor | None:
    used = [(str(m.month), m.scores[g]) for m in history if m.mature and g in m.scores]
    used = [(month, ss) for month, ss in used if ss.power.n > 0]
    if not used:
        return None
    months = tuple(month for month, _ in used)
    counts = np.sum([ss.bin_counts for _, ss in used], axis=0)
    sums = np.sum([ss.bin_score_sums for _, ss in used], axis=0)
    filled = counts > 0
    risks = sums[filled] / counts[filled]
    per_month = np.maximum(np.rint(counts[filled] / len(used)), 0).astype(np.int64)
    if per_month.sum() == 0:
        per_month[np.argmax(counts[filled])] = 1
    sides = []
    for side, odds in _ODDS:
        terms = [ss.log_double if odds == 2.0 else ss.log_half for _, ss in used]
        increments = [
            risk_adjusted_llr(ss.power.sum_y, term, odds)
            for (_, ss), term in zip(used, terms, strict=True)
        ]
        limit = _limit(risk_adjusted_step_distribution(risks, per_month, odds), false_alarm)
        sides.append(_chart(side, 1.0, odds, increments, months, limit))
    estimates = []
    for month, ss in used:
        p = ss.power
        # Observed minus expected outcome rate, with a normal interval from the variance the
        # scores imply (sum of p(1 - p)): descriptive.
        half = Z95 * math.sqrt(max(p.sum_p - p.sum_p2, 0.0)) / p.n
        value = (p.sum_y - p.sum_p) / p.n
        estimates.append(MonthEstimate(month, value, value - half, value + half))
    return Monitor(
        version,
        CheckKind.CALIBRATION,
        "outcome_vs_score",
        g,
        "score",
        months,
        tuple(sides),
        tuple(estimates),
        None,
        None,
        ((g, "observed"), (g, "positives"), (g, "negatives")),
    )


def version_monitors(
    version: int,
    document: PolicyDocument,
    settings: VersionSettings,
    history: Sequence[MonthCounts],
    level: float,
) -> list[Monitor]:
    """The charts of one version over ``history`` (oldest first, this month last)."""
    targets = document.targets
    if targets is None or not history:
        return []
    fav = document.favourable
    outside = {g for g, t in targets.groups.items() if t.outside_promise}
    seen = sorted({g for m in history for g in m.cells})
    groups = [g for g in seen if g not in outside]
    specs: list[tuple[CheckKind, str, str, str]] = []
    ref = settings.reference_group
    if ref is not None:
        for metric in CRITERION_METRICS[targets.criterion]:
            specs += [(CheckKind.PARITY, metric, g, ref) for g in groups if g != ref]
    comp = settings.comparator_group
    if targets.criterion is Criterion.FOUR_FIFTHS and comp is not None:
        specs += [(CheckKind.FOUR_FIFTHS, "favourable_rate", g, comp) for g in groups if g != comp]
    probability_scores = tuple(document.score_range) == (0.0, 1.0)
    scored = [g for g in seen if probability_scores and any(g in m.scores for m in history)]
    charts = sum(len(_designs(kind, settings.tolerance)) for kind, *_ in specs)
    charts += len(_ODDS) * len(scored)
    if charts == 0:
        return []
    false_alarm = level / charts
    monitors: list[Monitor] = []
    for kind, metric, g, against in specs:
        series = _series(history, g, against, metric, fav)
        if not series.months:
            continue
        sides = tuple(
            s
            for d in _designs(kind, settings.tolerance)
            if (s := _side(d, series, false_alarm)) is not None
        )
        pooled, trend = _pooled_and_trend(series)
        num, den = fraction_of(metric, fav)
        monitors.append(
            Monitor(
                version,
                kind,
                metric,
                g,
                against,
                series.months,
                sides,
                _estimates(kind, series),
                pooled,
                trend,
                ((g, num), (g, den), (against, num), (against, den)),
            )
        )
    for g in scored:
        monitor = _outcome_monitor(version, g, history, false_alarm)
        if monitor is not None:
            monitors.append(monitor)
    return monitors
