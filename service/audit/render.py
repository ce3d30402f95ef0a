"""Rendering a report snapshot as JSON, CSV (one row per month x version x group x metric) and
one self-contained HTML page with inline SVG charts.

Everything is rendered from the snapshot alone, so a stored snapshot can be re-rendered at any
time and gives the same figures.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Iterator, Mapping
from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
from jinja2 import Environment, PackageLoader, Undefined, select_autoescape
from markupsafe import Markup
from matplotlib.figure import Figure

from service.audit.snapshot import METRIC_LABELS, TREND_METRICS
from service.policy.realized import GAP_METRICS, RATE_METRICS

CSV_COLUMNS = (
    "month",
    "policy",
    "version",
    "section",
    "group",
    "kind",
    "metric",
    "value",
    "low",
    "high",
    "note",
)
"""``section`` is ``active`` or ``shadow-<version>``; ``kind`` is count, rate, gap, ratio or
cost; ``note`` says why a value is missing ("<11", small-cell, not-identifiable, no-cases)."""

CHART_RATES = ("action_rate", "coverage", "tpr", "fpr", "ppv", "npv")
_COLOURS = ("#1f5f8b", "#c2571a", "#3a7d44", "#7b4f9e", "#8c6d1f", "#5b6770", "#b03a5b")

plt.rcParams.update(
    {
        "svg.fonttype": "none",
        "svg.hashsalt": "evenhand-report",
        "font.size": 9,
        "font.family": "sans-serif",
        "axes.spines.top": False,
        "axes.spines.right": False,
    }
)


def to_json(snapshot: Mapping[str, Any]) -> str:
    return json.dumps(snapshot, indent=2, sort_keys=True, ensure_ascii=False, allow_nan=False)


def csv_rows(snapshot: Mapping[str, Any]) -> Iterator[dict[str, Any]]:
    base = {"month": snapshot["month"], "policy": snapshot["policy"]}
    for v in snapshot["versions"]:
        vb = {**base, "version": v["version"]}
        for g in v["groups"]:
            gb = {**vb, "section": "active", "group": g["group"]}
            yield from _count_rows(gb, g["counts"])
            for metric, r in g["rates"].items():
                yield _value_row(gb, "rate", metric, r)
            for metric, r in g["gaps"].items():
                yield _value_row(gb, "gap", metric, r)
            ff = g["four_fifths"]
            yield _value_row(
                gb,
                "ratio",
                "four_fifths_ratio",
                {"value": ff["ratio"], "withheld": ff.get("withheld")},
            )
            cost = g["cost_per_case"]
            for name in ("realized", "expected", "promised"):
                yield _value_row(
                    gb,
                    "cost",
                    f"cost_per_case_{name}",
                    {"value": cost[name], "withheld": cost.get("withheld")},
                )
        for shadow in v["shadows"]:
            for g in shadow["groups"]:
                sb = {**vb, "section": f"shadow-{shadow['version']}", "group": g["group"]}
                yield from _count_rows(sb, g["counts"])
                for metric, r in g["rates"].items():
                    yield _value_row(sb, "rate", metric, r)


def _count_rows(base: dict[str, Any], counts: Mapping[str, Any]) -> Iterator[dict[str, Any]]:
    for name, value in counts.items():
        if isinstance(value, int):
            yield {**base, "kind": "count", "metric": name, "value": value, "note": ""}
        else:
            note = value if isinstance(value, str) else "small-cell"
            yield {**base, "kind": "count", "metric": name, "value": "", "note": note}


def _value_row(
    base: dict[str, Any], kind: str, metric: str, r: Mapping[str, Any]
) -> dict[str, Any]:
    def cell(x: Any) -> Any:
        return "" if x is None else repr(float(x))

    value = r.get("value")
    note = "" if value is not None else (r.get("withheld") or "no-value")
    return {
        **base,
        "kind": kind,
        "metric": metric,
        "value": cell(value),
        "low": cell(r.get("low")),
        "high": cell(r.get("high")),
        "note": note,
    }


def to_csv(snapshot: Mapping[str, Any]) -> str:
    out = io.StringIO()
    writer = csv.DictWriter(out, fieldnames=CSV_COLUMNS, lineterminator="\n", restval="")
    writer.writeheader()
    for row in csv_rows(snapshot):
        writer.writerow(row)
    return out.getvalue()


def _svg(fig: Figure) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    plt.close(fig)
    text = buf.getvalue()
    return text[text.index("<svg") :]


def _err(r: Mapping[str, Any]) -> list[list[float]]:
    """Whisker lengths below and above the point (Wilson limits can miss 0 or 1 by an ulp)."""
    return [[max(0.0, r["value"] - r["low"])], [max(0.0, r["high"] - r["value"])]]


def _colour(i: int) -> str:
    return _COLOURS[i % len(_COLOURS)]


def rates_chart(version: Mapping[str, Any]) -> str | None:
    """One panel per rate: each group's point and Wilson 95% interval."""
    metrics = [
        m for m in CHART_RATES if any(g["rates"][m]["value"] is not None for g in version["groups"])
    ]
    if not metrics:
        return None
    groups = [g["group"] for g in version["groups"]]
    cols = 3
    rows = math.ceil(len(metrics) / cols)
    fig, axes = plt.subplots(
        rows, cols, figsize=(7.6, 0.45 + rows * (0.35 + 0.28 * len(groups))), squeeze=False
    )
    for ax in axes.flat[len(metrics) :]:
        ax.set_visible(False)
    for ax, metric in zip(axes.flat, metrics, strict=False):
        for i, g in enumerate(version["groups"]):
            r = g["rates"][metric]
            y = len(groups) - 1 - i
            if r["value"] is None:
                ax.text(0.5, y, r.get("withheld", "n/a"), ha="center", va="center", color="#777")
                continue
            ax.errorbar(
                [r["value"]],
                [y],
                xerr=_err(r),
                fmt="o",
                color=_colour(i),
                capsize=3,
                markersize=4,
            )
        ax.set_xlim(0, 1)
        ax.set_ylim(-0.6, len(groups) - 0.4)
        ax.set_yticks(range(len(groups)), list(reversed(groups)))
        ax.set_title(METRIC_LABELS.get(metric, metric), fontsize=9, loc="left")
        ax.grid(axis="x", color="#ddd", linewidth=0.6)
    fig.tight_layout()
    return _svg(fig)


def roc_chart(version: Mapping[str, Any]) -> str | None:
    """Realized (FPR, TPR) of each group with interval whiskers; promised points hollow."""
    points = [g for g in version["groups"] if g["rates"]["tpr"]["value"] is not None]
    promised = [g for g in version["groups"] if g.get("promised")]
    if not points and not promised:
        return None
    fig, ax = plt.subplots(figsize=(4.2, 4.0))
    ax.plot([0, 1], [0, 1], color="#bbb", linewidth=0.8, linestyle=":")
    for i, g in enumerate(version["groups"]):
        tpr, fpr = g["rates"]["tpr"], g["rates"]["fpr"]
        colour = _colour(i)
        if tpr["value"] is not None and fpr["value"] is not None:
            ax.errorbar(
                [fpr["value"]],
                [tpr["value"]],
                xerr=_err(fpr),
                yerr=_err(tpr),
                fmt="o",
                color=colour,
                capsize=2,
                markersize=5,
                label=f"{g['group']} realized",
            )
        if g.get("promised"):
            p = g["promised"]
            ax.plot(
                [p["fpr"]],
                [p["tpr"]],
                marker="D",
                markerfacecolor="white",
                color=colour,
                markersize=6,
                linestyle="none",
                label=f"{g['group']} promised",
            )
            if tpr["value"] is not None and fpr["value"] is not None:
                ax.annotate(
                    "",
                    xy=(fpr["value"], tpr["value"]),
                    xytext=(p["fpr"], p["tpr"]),
                    arrowprops={"arrowstyle": "->", "color": colour, "linewidth": 0.8},
                )
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_xlabel("FPR = P(action | outcome 0)")
    ax.set_ylabel("TPR = P(action | outcome 1)")
    ax.grid(color="#eee", linewidth=0.6)
    ax.legend(fontsize=7, loc="lower right", frameon=False)
    fig.tight_layout()
    return _svg(fig)


def trend_chart(snapshot: Mapping[str, Any]) -> str | None:
    """The gap of each group to the reference over the last 12 months, one panel per rate."""
    trend = snapshot.get("trend", [])
    metrics = [m for m in TREND_METRICS if any(p["metric"] == m for p in trend)]
    if not metrics:
        return None
    months = sorted({p["month"] for p in trend})
    groups = sorted({p["group"] for p in trend})
    fig, axes = plt.subplots(1, len(metrics), figsize=(7.6, 2.3), squeeze=False, sharey=True)
    for ax, metric in zip(axes.flat, metrics, strict=True):
        ax.axhline(0, color="#999", linewidth=0.8)
        for i, group in enumerate(groups):
            pts = [p for p in trend if p["metric"] == metric and p["group"] == group]
            xs = [months.index(p["month"]) for p in pts if p["value"] is not None]
            ys = [p["value"] for p in pts if p["value"] is not None]
            lo = [p["low"] for p in pts if p["value"] is not None]
            hi = [p["high"] for p in pts if p["value"] is not None]
            if not xs:
                continue
            ax.fill_between(xs, lo, hi, color=_colour(i), alpha=0.12, linewidth=0)
            ax.plot(xs, ys, marker="o", markersize=3, color=_colour(i), label=group)
        ax.set_title(f"{METRIC_LABELS.get(metric, metric)} gap", fontsize=9, loc="left")
        ax.set_xticks(range(len(months)), [m[2:] for m in months], rotation=60, fontsize=7)
        ax.grid(axis="y", color="#eee", linewidth=0.6)
    axes.flat[0].legend(fontsize=7, frameon=False)
    fig.tight_layout()
    return _svg(fig)


def _fmt(value: Any, digits: int = 3) -> str:
    if value is None or isinstance(value, Undefined):
        return "\u2013"
    if isinstance(value, str):
        return value
    if isinstance(value, int) and not isinstance(value, bool):
        return f"{value:,}"
    return f"{value:.{digits}f}"


def _fmt_count(value: Any) -> str:
    """A published count: the number, "<11", or "withheld" (complementary suppression)."""
    return "withheld" if value is None or isinstance(value, Undefined) else _fmt(value)


def _fmt_rate(r: Mapping[str, Any]) -> str:
    """A rate and, in small type below it, its 95% interval (or why there is no number)."""
    if r.get("value") is None:
        reason = r.get("withheld", "")
        return {
            "small-cell": "withheld",
            "not-identifiable": "not identifiable",
            "no-cases": "no cases",
        }.get(reason, "\u2013")
    return Markup(
        f'{r["value"]:.3f}<br><span class="ci">{r["low"]:.3f}\u2013{r["high"]:.3f}</span>'
    )


def _fmt_gap(r: Mapping[str, Any] | None) -> str:
    if r is None:
        return "reference"
    if r.get("value") is None:
        return _fmt_rate(r)
    return Markup(
        f'{r["value"]:+.3f}<br><span class="ci">{r["low"]:+.3f} to {r["high"]:+.3f}</span>'
    )


_ENV = Environment(
    loader=PackageLoader("service.audit", "templates"),
    autoescape=select_autoescape(["html", "j2"]),
    trim_blocks=True,
    lstrip_blocks=True,
)
_ENV.filters["fmt"] = _fmt
_ENV.filters["rate"] = _fmt_rate
_ENV.filters["count"] = _fmt_count
_ENV.filters["gapfmt"] = _fmt_gap
_ENV.globals["labels"] = METRIC_LABELS


def _alert_notes(alerts: list[Mapping[str, Any]]) -> list[str]:
    """too-few and not-identifiable alerts, one line per version and status (the JSON and
    CSV keep every one): they say what could not be checked, not what went wrong."""
    grouped: dict[tuple[int, str], list[str]] = {}
    for a in alerts:
        if a["status"] in ("too-few", "not-identifiable"):
            what = f"{METRIC_LABELS.get(a['metric'], a['metric'])} {a['check']} of {a['group']}"
            grouped.setdefault((a["version"], a["status"]), []).append(what)
    reason = {
        "too-few": "too few cases to decide",
        "not-identifiable": "not identifiable (outcomes seen only after some decisions)",
    }
    return [
        f"version {v}: {len(items)} check(s) {reason[status]}: " + "; ".join(items)
        for (v, status), items in sorted(grouped.items())
    ]


def to_html(snapshot: Mapping[str, Any]) -> str:
    charts = {
        v["version"]: {"rates": rates_chart(v), "roc": roc_chart(v)} for v in snapshot["versions"]
    }
    template = _ENV.get_template("report.html.j2")
    return template.render(
        s=snapshot,
        charts=charts,
        trend=trend_chart(snapshot),
        main_alerts=[a for a in snapshot["alerts"] if a["status"] in ("breach", "watch")],
        alert_notes=_alert_notes(snapshot["alerts"]),
        # The favourable rate is the action rate or its complement; overrides have their own
        # table: leaving them out keeps the table within a printed page.
        table_rates=[m for m in RATE_METRICS if m not in ("favourable_rate", "override_rate")],
        gap_metrics=GAP_METRICS,
    )
