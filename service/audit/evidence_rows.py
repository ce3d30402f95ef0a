"""Rows of the evidence beyond one month's checks: calibration within groups, and the charts
across months with their pooled gaps and trends."""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from service.audit.check_rows import METRIC_LABELS
from service.audit.monitoring import DESIGN_HORIZON, HORIZON, STATES, WINDOW, Monitor
from service.audit.published_counts import CountVisibility
from service.audit.realized import BINS
from service.audit.snapshot_model import (
    AlertRow,
    CalibrationRow,
    ChartSideRow,
    Estimate,
    MonitorRow,
    MonthEstimateRow,
    PValueRow,
    ReliabilityRow,
    TrendRow,
)
from service.audit.verdicts import CheckKind
from service.audit.version_counts import VersionCounts
from service.policy.document import AuditPlan
from service.stats.calibration import (
    CalibrationTest,
    observed_expected_test,
    reliability_table,
    spiegelhalter_test,
)
from service.stats.multiplicity import adjust_p_values

EDGES = [i / BINS for i in range(BINS + 1)]


def probability_scores(v: VersionCounts) -> bool:
    return tuple(v.document.score_range) == (0.0, 1.0)


def calibration_rows(
    v: VersionCounts,
    vis: CountVisibility,
    plan: AuditPlan,
    decide_outcomes: bool,
    min_count: int,
) -> tuple[list[CalibrationRow], str | None]:
    """Spiegelhalter's test and the observed-minus-expected test per group, adjusted together,
    with a reliability table. Only for scores that are probabilities."""
    if not probability_scores(v) or not v.scores:
        return [], None
    tested: dict[str, tuple[CalibrationTest, CalibrationTest]] = {}
    for g, ss in sorted(v.scores.items()):
        if decide_outcomes and ss.power.n >= min_count:
            try:
                tested[g] = (spiegelhalter_test(ss.power), observed_expected_test(ss.power))
            except ValueError:  # no variance (every score 0, 1/2 or 1): nothing to test
                continue
    raw = [p for a, b in tested.values() for p in (a.p_value, b.p_value)]
    adjusted = iter(adjust_p_values(raw, plan.multiplicity))
    rows: list[CalibrationRow] = []
    for g, ss in sorted(v.scores.items()):
        hidden = vis.any_hidden([(g, "observed"), (g, "positives"), (g, "negatives")])
        tests = tested.get(g)
        pair = None
        if tests is not None:
            pair = [
                PValueRow(statistic=t.statistic, p_value=t.p_value, p_adjusted=next(adjusted))
                for t in tests
            ]
        if pair is not None:
            status = "departs" if min(r.p_adjusted for r in pair) <= plan.level else "no-evidence"
        else:
            status = "pending" if not decide_outcomes else "too-few"
        reliability = []
        bins = reliability_table(EDGES, ss.bin_counts, ss.bin_positives, ss.bin_score_sums)
        for i, b in enumerate(bins):
            bin_hidden = vis.hidden("bin", g, str(i)) or hidden
            observed = (
                Estimate(withheld="small-cell" if b.n else "no-cases")
                if bin_hidden or b.observed is None
                else Estimate(value=b.observed, low=b.observed_low, high=b.observed_high)
            )
            reliability.append(
                ReliabilityRow(
                    low=b.low,
                    high=b.high,
                    n=vis.shown("bin", g, str(i)),
                    mean_score=None if bin_hidden else b.mean_score,
                    observed=observed,
                )
            )
        p = ss.power
        rows.append(
            CalibrationRow(
                group=g,
                status=status,
                mean_score=None if hidden or not p.n else p.sum_p / p.n,
                observed_rate=None if hidden or not p.n else p.sum_y / p.n,
                spiegelhalter=None if hidden or pair is None else pair[0],
                observed_expected=None if hidden or pair is None else pair[1],
                reliability=reliability,
                withheld="small-cell" if hidden else None,
            )
        )
    method = "Holm (1979)" if plan.multiplicity == "holm" else "Benjamini & Yekutieli (2001)"
    text = (
        f"For each group with at least {min_count} outcomes: Spiegelhalter's z test (Spiegelhalter "
        "1986, Statistics in Medicine 5:421-433) and the z test of observed minus expected "
        "outcomes, both of the score read as a probability. Their "
        f"{len(raw)} p-value(s) form one family, adjusted by {method} at level {plan.level:g}; a "
        "group departs when a test rejects after adjustment."
    )
    return rows, text


def design_text(monitors: Sequence[Monitor], level: float) -> str | None:
    charts = sum(len(m.sides) for m in monitors)
    if not charts:
        return None
    return (
        "Cumulative-sum charts over the months of this version (Bernoulli CUSUM, Reynolds & "
        "Stoumbos 1999; risk-adjusted, Steiner et al. 2000). Each gap chart weighs a gap of "
        "twice the tolerance against the tolerance itself, with the reference group's rate of "
        "the same month as its base; each outcome chart weighs odds doubled or halved against "
        f"the scores. Each audit recomputes a chart over the latest {WINDOW} months. Each of the "
        f"{charts} chart(s) has the limit whose chance of a false signal within "
        f"{DESIGN_HORIZON} months from zero, at the edge of the promise, is at most "
        f"{level:g}/{charts} (Markov chain of Brook & Evans 1972, {STATES} states); the windows "
        f"of any {HORIZON} months' audits lie within {DESIGN_HORIZON} months, so together at "
        f"most {level:g} in every year of use. Months whose outcomes were not mature are left "
        "out of outcome-based charts."
    )


def _what(m: Monitor) -> str:
    metric = METRIC_LABELS.get(m.metric, m.metric)
    if m.kind is CheckKind.CALIBRATION:
        return f"outcomes of {m.group} against their scores"
    if m.kind is CheckKind.FOUR_FIFTHS:
        return f"favourable-rate ratio of {m.group} to {m.against}"
    return f"{metric} gap of {m.group} vs {m.against}"


def _meaning(m: Monitor, side: str) -> str:
    if m.kind is CheckKind.CALIBRATION:
        return "odds of the outcome " + ("above" if side == "above" else "below") + " the scores'"
    if m.kind is CheckKind.FOUR_FIFTHS:
        return "a ratio below 0.8"
    return "a gap " + ("above" if side == "above" else "below") + " the tolerance"


def monitor_rows(
    version: int,
    monitors: Sequence[Monitor],
    month_visibility: Mapping[str, CountVisibility],
) -> tuple[list[MonitorRow], list[AlertRow]]:
    rows: list[MonitorRow] = []
    alerts: list[AlertRow] = []
    for m in monitors:
        hidden_months = {
            month for month in m.months if month_visibility[month].any_hidden(m.figures_from)
        }
        any_hidden = bool(hidden_months)
        sides = [
            ChartSideRow(
                side="above" if s.side == "above" else "below",
                in_control=s.in_control,
                out_of_control=s.out_of_control,
                limit=s.limit,
                statistic=None if any_hidden else s.statistic,
                path=None if any_hidden else list(s.path),
                signal=s.signal,
                first_signal=s.first_signal,
            )
            for s in m.sides
        ]
        estimates = [
            MonthEstimateRow(
                month=e.month,
                estimate=Estimate(withheld="small-cell")
                if e.month in hidden_months
                else Estimate(value=e.value, low=e.low, high=e.high),
            )
            for e in m.estimates
        ]
        pooled = None
        if m.pooled is not None:
            pooled = (
                Estimate(withheld="small-cell")
                if any_hidden
                else Estimate(value=m.pooled.estimate, low=m.pooled.low, high=m.pooled.high)
            )
        trend = None
        if m.trend is not None and not any_hidden:
            trend = TrendRow(
                slope=m.trend.slope,
                standard_error=m.trend.standard_error,
                p_value=m.trend.p_value,
                points=m.trend.points,
            )
        signalling = [s for s in m.sides if s.signal]
        if signalling:
            s = signalling[0]
            figures = "" if any_hidden else f"; statistic {s.statistic:.2f} >= limit {s.limit:.2f}"
            message = (
                f"{_what(m)}: watch; its {s.side} chart signals (first in {s.first_signal}): "
                f"accumulated evidence over {len(m.months)} month(s) of {_meaning(m, s.side)}"
                f"{figures}"
            )
        else:
            message = f"{_what(m)}: in control over {len(m.months)} month(s)"
        key = f"v{version}/{m.kind.value}/{m.metric}/{m.group}"
        check = m.kind.value
        rows.append(
            MonitorRow(
                key=key,
                check=check,
                metric=m.metric,
                group=m.group,
                against=m.against,
                months=list(m.months),
                sides=sides,
                estimates=estimates,
                pooled=pooled,
                trend=trend,
                signal=m.signal,
                message=message,
            )
        )
        if m.signal:
            alerts.append(
                AlertRow(
                    level="watch",
                    version=version,
                    check=check,
                    metric=m.metric,
                    group=m.group,
                    against=m.against,
                    message=message,
                )
            )
    return rows, alerts
