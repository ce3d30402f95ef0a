"""The month page's group rates (table and charts) and the cross-month charts (pure).

Every figure comes from the stored snapshot as the API serves it: a group's realized rates
with their 95% intervals (``versions[].groups[].rates``) and, across months, the estimates and
monitoring chart states of ``GET /v1/reports/{name}/history``. Nothing is recomputed.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from service.audit.check_rows import METRIC_LABELS
from service.audit.history import HistoryRow
from service.audit.realized import RATE_METRICS
from service.audit.snapshot_model import Estimate, GroupRow, VersionSection
from service.console.interval_chart import Figure, IntervalChart, interval_chart

# The rates a group row's table shows (the stored HTML report's choice) and those charted.
TABLE_RATES = tuple(m for m in RATE_METRICS if m not in ("favourable_rate", "override_rate"))
CHART_RATES = ("action_rate", "coverage", "tpr", "fpr", "ppv", "npv")
_WITHHELD = {
    "small-cell": "withheld (small cell)",
    "not-identifiable": "not identifiable",
    "no-cases": "no cases",
    "pending": "pending",
}
# Shorter words under a chart's slot, where a withheld figure's point would be.
_WITHHELD_SHORT = {
    "small-cell": "withheld",
    "not-identifiable": "n/a",
    "no-cases": "no cases",
    "pending": "pending",
}
DASH = "\u2013"


def _label(metric: str) -> str:
    return METRIC_LABELS.get(metric, metric)


def _count(value: int | str | None) -> str:
    if value is None:
        return "withheld"
    return value if isinstance(value, str) else f"{value:,}"


def _cell(e: Estimate) -> str:
    if e.value is None or e.low is None or e.high is None:
        return _WITHHELD.get(e.withheld or "", DASH)
    return f"{e.value:.3f} ({e.low:.3f} {DASH} {e.high:.3f})"


def _figure(key: str, e: Estimate, what: str, signal: bool = False) -> Figure:
    if e.value is None or e.low is None or e.high is None:
        note = _WITHHELD_SHORT.get(e.withheld or "", DASH)
        return Figure(key, None, None, None, f"{what}: {note}", note)
    title = f"{what}: {e.value:.3f}, 95% interval {e.low:.3f} to {e.high:.3f}"
    return Figure(key, e.value, e.low, e.high, title, signal=signal)


@dataclass(frozen=True)
class GroupLine:
    group: str
    role: str  # "reference", "comparator", "outside the promise" or ""
    cases: str
    outcomes: str
    rates: list[str]  # one cell per TABLE_RATES metric: estimate (interval)


@dataclass(frozen=True)
class RateChart:
    metric: str
    label: str
    chart: IntervalChart


@dataclass(frozen=True)
class GroupRates:
    headers: list[str]  # the TABLE_RATES metrics' labels
    lines: list[GroupLine]
    charts: list[RateChart]


def _role(g: GroupRow) -> str:
    roles = [
        name
        for name, on in (
            ("reference", g.reference),
            ("comparator", g.comparator),
            ("outside the promise", g.outside_promise is not None),
        )
        if on
    ]
    return ", ".join(roles)


def group_rates(v: VersionSection) -> GroupRates:
    """Each group's realized rates with their 95% intervals: a table and, per charted rate
    that any group has, a chart of the groups side by side on a 0 to 1 axis."""
    lines = [
        GroupLine(
            group=g.group,
            role=_role(g),
            cases=_count(g.counts.get("n")),
            outcomes=_count(g.counts.get("observed")),
            rates=[_cell(g.rates[m]) if m in g.rates else DASH for m in TABLE_RATES],
        )
        for g in v.groups
    ]
    charts = []
    for metric in CHART_RATES:
        estimates = [(g.group, g.rates.get(metric, Estimate())) for g in v.groups]
        if all(e.value is None for _, e in estimates):
            continue
        label = _label(metric)
        figures = [_figure(group, e, f"{label} of {group}") for group, e in estimates]
        title = f"Version {v.version}: {label} by group, with 95% intervals"
        charts.append(RateChart(metric, label, interval_chart(title, figures, 0.0, 1.0)))
    return GroupRates([_label(m) for m in TABLE_RATES], lines, charts)


def history_chart(title: str, check: str, rows: Sequence[HistoryRow]) -> IntervalChart:
    """One group and check over months: each month's estimate with its interval, joined in
    order, a month whose monitoring chart signals marked; the axis holds 0 (and 1 for rates
    and ratios), with a reference line at no gap (parity) or at four-fifths."""
    figures = [
        _figure(
            r.month,
            r.estimate,
            f"{r.month} (v{r.version}, {r.maturity}, {r.status or 'no status'}"
            + (", the monitoring chart signals" if r.chart is not None and r.chart.signal else "")
            + ")",
            signal=r.chart is not None and r.chart.signal,
        )
        for r in rows
    ]
    reference = {"parity": (0.0, "no gap"), "four-fifths": (0.8, "four-fifths")}.get(check)
    ceiling = 0.0 if check == "parity" else 1.0
    return interval_chart(title, figures, 0.0, ceiling, join=True, reference=reference)
