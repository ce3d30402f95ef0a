"""A report snapshot as CSV: one row per month x version x section x group x figure.

Columns: ``month, policy, view, version, section, group, kind, metric, value, low, high,
status, note``. ``section`` is ``groups``, ``checks`` or ``shadow-<version>``; ``kind`` is
``count``, ``rate``, ``gap``, ``ratio``, ``cost`` or a check name (``parity``,
``four-fifths``, ``promise``); ``value`` is numeric or empty, and ``note`` says why it is
empty. Every note is documented in docs/audit.md ("CSV").
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator
from typing import Any

from service.audit.snapshot_model import Estimate, PublishedCount, Snapshot

CSV_COLUMNS = (
    "month",
    "policy",
    "view",
    "version",
    "section",
    "group",
    "kind",
    "metric",
    "value",
    "low",
    "high",
    "status",
    "note",
)

NOTES = {
    "<11": "a count from 1 to 10, not published",
    "small-cell": "withheld: a count from 1 to 10 could be worked out from it",
    "not-identifiable": "outcomes are observed only after some decisions",
    "no-cases": "no cases to compute it on",
    "pending": "the month's outcomes are not mature yet",
}
"""Every value of the ``note`` column."""


def _number(x: float | None) -> str:
    return "" if x is None else repr(float(x))


def _estimate_row(base: dict[str, Any], kind: str, metric: str, e: Estimate) -> dict[str, Any]:
    return {
        **base,
        "kind": kind,
        "metric": metric,
        "value": _number(e.value),
        "low": _number(e.low),
        "high": _number(e.high),
        "note": e.withheld or "",
    }


def _count_row(base: dict[str, Any], name: str, value: PublishedCount) -> dict[str, Any]:
    if isinstance(value, int):
        return {**base, "kind": "count", "metric": name, "value": value}
    return {**base, "kind": "count", "metric": name, "note": value or "small-cell"}


def csv_rows(s: Snapshot) -> Iterator[dict[str, Any]]:
    top = {"month": s.month, "policy": s.policy, "view": s.view}
    for v in s.versions:
        vb = {**top, "version": v.version}
        for g in v.groups:
            gb = {**vb, "section": "groups", "group": g.group}
            for name, value in g.counts.items():
                yield _count_row(gb, name, value)
            for metric, e in g.rates.items():
                yield _estimate_row(gb, "rate", metric, e)
            for metric, e in g.gaps.items():
                yield _estimate_row(gb, "gap", metric, e)
            if g.four_fifths is not None:
                yield _estimate_row(gb, "ratio", "four_fifths_ratio", g.four_fifths.ratio)
            cost = g.cost_per_case
            for name in ("realized", "expected", "promised"):
                value = getattr(cost, name)
                note = "" if value is not None else (cost.withheld or "no-cases")
                yield {
                    **gb,
                    "kind": "cost",
                    "metric": f"cost_per_case_{name}",
                    "value": _number(value),
                    "note": note,
                }
        for c in v.checks:
            row = _estimate_row(
                {**vb, "section": "checks", "group": c.group}, c.check, c.metric, c.estimate
            )
            row["status"] = c.status
            yield row
        for shadow in v.shadows:
            for sg in shadow.groups:
                sb = {**vb, "section": f"shadow-{shadow.version}", "group": sg.group}
                for name, value in sg.counts.items():
                    yield _count_row(sb, name, value)
                for metric, e in sg.rates.items():
                    yield _estimate_row(sb, "rate", metric, e)


def to_csv(snapshot: Snapshot) -> str:
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=CSV_COLUMNS, lineterminator="\n", restval="")
    writer.writeheader()
    for row in csv_rows(snapshot):
        writer.writerow(row)
    return out.getvalue()
