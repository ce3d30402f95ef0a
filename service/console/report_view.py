"""A stored audit snapshot and the cross-month view as the console's tables (pure).

Values are formatted here, as text, so the templates only place them: estimates to three
decimals with their 95% interval, p-values to four (below 0.0001 as "<0.0001"), counts with
thousands separators, a withheld figure as the reason it is withheld.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

from service.audit.check_rows import METRIC_LABELS
from service.audit.history import ChartState, HistoryRow
from service.audit.snapshot_model import Estimate, PublishedCount, Snapshot
from service.console.interval_chart import IntervalChart
from service.console.report_charts import GroupRates, group_rates, history_chart

_WITHHELD = {
    "small-cell": "withheld (small cell)",
    "not-identifiable": "not identifiable",
    "no-cases": "no cases",
    "pending": "pending",
}
DASH = "\u2013"


def fmt_number(value: float | None, digits: int = 3, signed: bool = False) -> str:
    if value is None:
        return DASH
    return f"{value:{'+' if signed else ''}.{digits}f}"


def fmt_p(value: float | None) -> str:
    if value is None:
        return DASH
    return "<0.0001" if value < 1e-4 else f"{value:.4f}"


def fmt_count(value: PublishedCount) -> str:
    if value is None:
        return "withheld"
    if isinstance(value, str):
        return value
    return f"{value:,}"


def fmt_estimate(e: Estimate, signed: bool = False) -> tuple[str, str]:
    """(the figure, its interval); a withheld figure gives its reason and no interval."""
    if e.value is None or e.low is None or e.high is None:
        return _WITHHELD.get(e.withheld or "", DASH), ""
    sep = " to " if signed else " \u2013 "
    return (
        fmt_number(e.value, signed=signed),
        f"{fmt_number(e.low, signed=signed)}{sep}{fmt_number(e.high, signed=signed)}",
    )


def metric_label(metric: str) -> str:
    return METRIC_LABELS.get(metric, metric)


@dataclass(frozen=True)
class CheckLine:
    group: str
    check: str
    against: str
    estimate: str
    interval: str
    band: str
    breach_p: str
    breach_p_adjusted: str
    equivalence_p: str
    equivalence_p_adjusted: str
    status: str
    message: str


@dataclass(frozen=True)
class VersionPart:
    version: int
    criterion: str | None
    tolerance: str
    reference_group: str | None
    checks: list[CheckLine]
    totals: list[tuple[str, str]]
    rates: GroupRates


@dataclass(frozen=True)
class ReportPage:
    policy: str
    month: str
    cohort: str
    created_at: str
    code_version: str
    maturity: str
    maturity_reason: str
    observable: str
    observed: str
    share: str
    required_share: str
    mature_after: str
    outcome_checks: str
    family: str
    row_counts: list[tuple[str, str]]
    alerts: list[tuple[str, str]]
    versions: list[VersionPart] = field(default_factory=list)


def report_page(s: Snapshot) -> ReportPage:
    m = s.maturity
    versions = []
    for v in s.versions:
        checks = []
        for c in v.checks:
            signed = c.check == "parity"
            estimate, interval = fmt_estimate(c.estimate, signed=signed)
            band = (
                f"at least {fmt_number(c.band.low)}"
                if c.band.high is None
                else f"{fmt_number(c.band.low)} to {fmt_number(c.band.high)}"
            )
            ev = c.evidence
            checks.append(
                CheckLine(
                    group=c.group,
                    check=f"{c.check}: {metric_label(c.metric)}",
                    against=c.against,
                    estimate=estimate,
                    interval=interval,
                    band=band,
                    breach_p=fmt_p(ev.p_outside) if ev else DASH,
                    breach_p_adjusted=fmt_p(ev.p_outside_adjusted) if ev else DASH,
                    equivalence_p=fmt_p(ev.p_inside) if ev else DASH,
                    equivalence_p_adjusted=fmt_p(ev.p_inside_adjusted) if ev else DASH,
                    status=c.status,
                    message=c.message,
                )
            )
        versions.append(
            VersionPart(
                version=v.version,
                criterion=v.criterion,
                tolerance=f"{v.tolerance:g} ({v.tolerance_source})",
                reference_group=v.reference_group,
                checks=checks,
                totals=[(k, fmt_count(n)) for k, n in v.totals.items()],
                rates=group_rates(v),
            )
        )
    return ReportPage(
        policy=s.policy,
        month=s.month,
        cohort=f"{s.cohort.from_} to {s.cohort.until} ({s.time_zone})",
        created_at=s.created_at,
        code_version=s.code_version,
        maturity=m.state,
        maturity_reason=m.reason,
        observable=fmt_count(m.observable),
        observed=fmt_count(m.observed),
        share=DASH if m.share is None else f"{m.share:.1%}",
        required_share=f"{m.required_share:.0%}",
        mature_after=m.mature_after,
        outcome_checks=m.outcome_checks,
        family=f"{s.family.method}, level {s.family.level:g}, {s.family.tests} tests",
        row_counts=[(k, fmt_count(n)) for k, n in s.row_counts.items()],
        alerts=[
            (a.level, f"v{a.version} {a.check} {metric_label(a.metric)}, {a.group}: {a.message}")
            for a in s.alerts
        ],
        versions=versions,
    )


def chart_text(chart: ChartState | None) -> str:
    """The monitoring chart's state in words: its statistics against their limits."""
    if chart is None:
        return "no chart"
    parts = []
    if chart.above is not None and chart.above_limit is not None:
        parts.append(f"above {chart.above:.2f} of limit {chart.above_limit:.2f}")
    if chart.below is not None and chart.below_limit is not None:
        parts.append(f"below {chart.below:.2f} of limit {chart.below_limit:.2f}")
    state = f"signal since {chart.first_signal}" if chart.signal else "no signal"
    return "; ".join([state, *parts])


@dataclass(frozen=True)
class HistoryLine:
    month: str
    maturity: str
    version: int
    estimate: str
    interval: str
    status: str
    chart: str
    signal: bool


@dataclass(frozen=True)
class HistoryTable:
    group: str
    check: str
    against: str
    lines: list[HistoryLine]
    chart: IntervalChart


def history_tables(rows: Sequence[HistoryRow]) -> list[HistoryTable]:
    """One table per (group, check, metric, against), its months in order."""
    tables: dict[tuple[str, str, str, str], list[HistoryLine]] = {}
    raw: dict[tuple[str, str, str, str], list[HistoryRow]] = {}
    for r in sorted(rows, key=lambda r: (r.group, r.check, r.metric, r.against, r.month)):
        estimate, interval = fmt_estimate(r.estimate, signed=r.check == "parity")
        raw.setdefault((r.group, r.check, r.metric, r.against), []).append(r)
        tables.setdefault((r.group, r.check, r.metric, r.against), []).append(
            HistoryLine(
                month=r.month,
                maturity=r.maturity,
                version=r.version,
                estimate=estimate,
                interval=interval,
                status=r.status or DASH,
                chart=chart_text(r.chart),
                signal=r.chart is not None and r.chart.signal,
            )
        )
    return [
        HistoryTable(
            group=g,
            check=f"{c}: {metric_label(m)}",
            against=a,
            lines=lines,
            chart=history_chart(
                f"{c}: {metric_label(m)} of group {g}"
                + (f" against {a}" if a else "")
                + ", month by month, with 95% intervals",
                c,
                raw[(g, c, m, a)],
            ),
        )
        for (g, c, m, a), lines in tables.items()
    ]
