"""The cross-month view: one row per month x version x group x check, from stored snapshots.

Each row is what that month's latest snapshot said: the check's estimate with its interval,
its status, and the state of the chart that watches the same (version, rate, group) across
months (its statistics, limits and signal as of that month). Nothing is recomputed, so the
view shows what each month's report published.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence
from typing import Literal

from pydantic import BaseModel, ConfigDict
from sqlalchemy import select
from sqlalchemy.orm import Session

from service.audit.month import Month
from service.audit.snapshot_model import SNAPSHOT_FORMAT, Estimate, MonitorRow, Snapshot
from service.errors import Unprocessable
from service.store.audit_models import AuditSnapshot

MAX_MONTHS = 120


class ChartState(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")

    above: float | None
    above_limit: float | None
    below: float | None
    below_limit: float | None
    signal: bool
    first_signal: str | None


class HistoryRow(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")

    month: str
    maturity: Literal["mature", "provisional"]
    version: int
    check: str
    metric: str
    group: str
    against: str
    status: str
    estimate: Estimate
    chart: ChartState | None


def _chart_state(m: MonitorRow) -> ChartState:
    sides = {s.side: s for s in m.sides}
    above, below = sides.get("above"), sides.get("below")
    firsts = sorted(s.first_signal for s in m.sides if s.signal and s.first_signal)
    return ChartState(
        above=above.statistic if above else None,
        above_limit=above.limit if above else None,
        below=below.statistic if below else None,
        below_limit=below.limit if below else None,
        signal=m.signal,
        first_signal=firsts[0] if firsts else None,
    )


def history_rows(snapshots: Sequence[Snapshot]) -> list[HistoryRow]:
    """The rows of the view, month by month (pure)."""
    rows: list[HistoryRow] = []
    for s in sorted(snapshots, key=lambda x: x.month):
        for v in s.versions:
            charts = {m.key: m for m in v.monitoring}
            for c in v.checks:
                monitor = charts.get(c.key)
                rows.append(
                    HistoryRow(
                        month=s.month,
                        maturity=s.maturity.state,
                        version=v.version,
                        check=c.check,
                        metric=c.metric,
                        group=c.group,
                        against=c.against,
                        status=c.status,
                        estimate=c.estimate,
                        chart=None if monitor is None else _chart_state(monitor),
                    )
                )
            for m in v.monitoring:
                if m.check == "calibration":
                    last = m.estimates[-1].estimate if m.estimates else Estimate()
                    status = next((c.status for c in v.calibration if c.group == m.group), "")
                    rows.append(
                        HistoryRow(
                            month=s.month,
                            maturity=s.maturity.state,
                            version=v.version,
                            check=m.check,
                            metric=m.metric,
                            group=m.group,
                            against=m.against,
                            status=status,
                            estimate=last if m.months and m.months[-1] == s.month else Estimate(),
                            chart=_chart_state(m),
                        )
                    )
    return rows


def load_snapshots(
    session: Session,
    policy: str,
    first: Month,
    last: Month,
    view: Literal["published", "internal"] = "published",
) -> list[Snapshot]:
    """The latest current-format snapshot of each month from ``first`` to ``last``."""
    if last < first:
        raise Unprocessable(f"from {first} is after to {last}", field="from")
    span = (last.year - first.year) * 12 + last.month - first.month + 1
    if span > MAX_MONTHS:
        raise Unprocessable(f"at most {MAX_MONTHS} months at once (asked for {span})", field="to")
    months = [str(first.shifted(i)) for i in range(span)]
    rows = session.execute(
        select(AuditSnapshot.month, AuditSnapshot.content, AuditSnapshot.internal)
        .where(AuditSnapshot.policy == policy, AuditSnapshot.month.in_(months))
        .order_by(AuditSnapshot.month, AuditSnapshot.created_at, AuditSnapshot.id)
    )
    latest: dict[str, Snapshot] = {}
    for month, content, internal in rows:
        chosen = content if view == "published" else internal
        if chosen is not None and chosen.get("format") == SNAPSHOT_FORMAT:
            latest[month] = Snapshot.model_validate(chosen)
    return [latest[m] for m in sorted(latest)]


HISTORY_COLUMNS = (
    "month",
    "maturity",
    "version",
    "check",
    "metric",
    "group",
    "against",
    "status",
    "value",
    "low",
    "high",
    "note",
    "chart_above",
    "limit_above",
    "chart_below",
    "limit_below",
    "chart_signal",
    "first_signal",
)


def _number(x: float | None) -> str:
    return "" if x is None else repr(float(x))


def history_csv(rows: Sequence[HistoryRow]) -> str:
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=HISTORY_COLUMNS, lineterminator="\n")
    writer.writeheader()
    for r in rows:
        chart = r.chart
        writer.writerow(
            {
                "month": r.month,
                "maturity": r.maturity,
                "version": r.version,
                "check": r.check,
                "metric": r.metric,
                "group": r.group,
                "against": r.against,
                "status": r.status,
                "value": _number(r.estimate.value),
                "low": _number(r.estimate.low),
                "high": _number(r.estimate.high),
                "note": r.estimate.withheld or "",
                "chart_above": _number(chart.above) if chart else "",
                "limit_above": _number(chart.above_limit) if chart else "",
                "chart_below": _number(chart.below) if chart else "",
                "limit_below": _number(chart.below_limit) if chart else "",
                "chart_signal": ("signal" if chart.signal else "in-control") if chart else "",
                "first_signal": (chart.first_signal or "") if chart else "",
            }
        )
    return out.getvalue()
