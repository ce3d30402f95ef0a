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
signal within :data:`DESIGN_HORIZON` (36) months from zero is at most ``level / K`` at the edge
of the promise, ``K`` the number of charts of the version (Bonferroni), computed with the Markov
chain of Brook & Evans (1972) at the group's and the reference's mean monthly volumes, the
month's increment mixed over the reference's sampling spread (its realized rate is the base).
Each audit recomputes the charts over the latest :data:`WINDOW` (24) months, and the windows of
any year's audits lie within 36 months (service.audit.charts), so the chance that any chart of
a version signals falsely within a year of its use, any year, is at most the plan's level.

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

from collections.abc import Sequence

from service.audit.charts import DESIGN_HORIZON, HORIZON, STATES, WINDOW, ChartSide
from service.audit.gap_charts import designs, estimates_of, gap_side, pooled_and_trend, series_of
from service.audit.monitoring_types import Monitor, MonthCounts, MonthEstimate
from service.audit.outcome_charts import ODDS, outcome_monitor
from service.audit.realized import fraction_of
from service.audit.verdicts import CRITERION_METRICS, CheckKind
from service.audit.version_settings import VersionSettings
from service.policy.document import PolicyDocument
from service.policy.targets import Criterion

__all__ = [
    "DESIGN_HORIZON",
    "HORIZON",
    "STATES",
    "WINDOW",
    "ChartSide",
    "Monitor",
    "MonthCounts",
    "MonthEstimate",
    "version_monitors",
]


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
    charts = sum(len(designs(kind, settings.tolerance)) for kind, *_ in specs)
    charts += len(ODDS) * len(scored)
    if charts == 0:
        return []
    false_alarm = level / charts
    monitors: list[Monitor] = []
    for kind, metric, g, against in specs:
        series = series_of(history, g, against, metric, fav)
        if not series.months:
            continue
        sides = tuple(
            s
            for d in designs(kind, settings.tolerance)
            if (s := gap_side(d, series, false_alarm)) is not None
        )
        pooled, trend = pooled_and_trend(series)
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
                estimates_of(kind, series),
                pooled,
                trend,
                ((g, num), (g, den), (against, num), (against, den)),
            )
        )
    for g in scored:
        monitor = outcome_monitor(version, g, history, false_alarm)
        if monitor is not None:
            monitors.append(monitor)
    return monitors
