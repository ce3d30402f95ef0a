"""A report snapshot as one self-contained HTML page with inline SVG charts.

Everything is rendered from the snapshot alone, so a stored snapshot renders the same at any
time. matplotlib is imported only when a chart is drawn, and only through its object interface
(no global state is changed).
"""

from __future__ import annotations

import functools
import io
import math
from typing import TYPE_CHECKING, Any, cast

from jinja2 import Environment, PackageLoader, Undefined, select_autoescape
from markupsafe import Markup

from service.audit.check_rows import METRIC_LABELS
from service.audit.realized import GAP_METRICS, RATE_METRICS
from service.audit.snapshot_model import Estimate, MonitorRow, Snapshot, VersionSection

if TYPE_CHECKING:
    from matplotlib.figure import Figure

CHART_RATES = ("action_rate", "coverage", "tpr", "fpr", "ppv", "npv")
_COLOURS = ("#1f5f8b", "#c2571a", "#3a7d44", "#7b4f9e", "#8c6d1f", "#5b6770", "#b03a5b")
_STYLE: dict[str, Any] = {
    "svg.fonttype": "none",
    "svg.hashsalt": "evenhand-report",
    "font.size": 9,
    "font.family": "sans-serif",
    "axes.spines.top": False,
    "axes.spines.right": False,
}


def _figure(width: float, height: float, rows: int = 1, cols: int = 1) -> tuple[Figure, Any]:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    axes = fig.subplots(rows, cols, squeeze=False)
    return fig, axes


def _svg(fig: Figure) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    text = buf.getvalue()
    return text[text.index("<svg") :]


def _draw(draw: Any, *args: Any) -> str | None:
    import matplotlib

    with matplotlib.rc_context(cast(Any, _STYLE)):
        fig = draw(*args)
        return None if fig is None else _svg(fig)


def _err(e: Estimate) -> list[list[float]]:
    """Whisker lengths below and above the point (Wilson limits can miss 0 or 1 by an ulp)."""
    assert e.value is not None and e.low is not None and e.high is not None
    return [[max(0.0, e.value - e.low)], [max(0.0, e.high - e.value)]]


def _colour(i: int) -> str:
    return _COLOURS[i % len(_COLOURS)]


def _rates_figure(version: VersionSection) -> Figure | None:
    metrics = [m for m in CHART_RATES if any(g.rates[m].value is not None for g in version.groups)]
    if not metrics:
        return None
    groups = [g.group for g in version.groups]
    cols = 3
    rows = math.ceil(len(metrics) / cols)
    fig, axes = _figure(7.6, 0.45 + rows * (0.35 + 0.28 * len(groups)), rows, cols)
    for ax in axes.flat[len(metrics) :]:
        ax.set_visible(False)
    for ax, metric in zip(axes.flat, metrics, strict=False):
        for i, g in enumerate(version.groups):
            e = g.rates[metric]
            y = len(groups) - 1 - i
            if e.value is None:
                ax.text(0.5, y, e.withheld or "n/a", ha="center", va="center", color="#666")
                continue
            ax.errorbar(
                [e.value], [y], xerr=_err(e), fmt="o", color=_colour(i), capsize=3, markersize=4
            )
        ax.set_xlim(0, 1)
        ax.set_ylim(-0.6, len(groups) - 0.4)
        ax.set_yticks(range(len(groups)), list(reversed(groups)))
        ax.set_title(METRIC_LABELS.get(metric, metric), fontsize=9, loc="left")
        ax.grid(axis="x", color="#ddd", linewidth=0.6)
    fig.tight_layout()
    return fig


def _roc_figure(version: VersionSection) -> Figure | None:
    """Realized (FPR, TPR) of each group with interval whiskers; promised points hollow."""
    shown = [g for g in version.groups if g.rates["tpr"].value is not None]
    promised = [g for g in version.groups if g.promised]
    if not shown and not promised:
        return None
    fig, axes = _figure(4.2, 4.0)
    ax = axes[0][0]
    ax.plot([0, 1], [0, 1], color="#bbb", linewidth=0.8, linestyle=":")
    for i, g in enumerate(version.groups):
        tpr, fpr = g.rates["tpr"], g.rates["fpr"]
        colour = _colour(i)
        realized = tpr.value is not None and fpr.value is not None
        if realized:
            ax.errorbar(
                [fpr.value],
                [tpr.value],
                xerr=_err(fpr),
                yerr=_err(tpr),
                fmt="o",
                color=colour,
                capsize=2,
                markersize=5,
                label=f"{g.group} realized",
            )
        if g.promised:
            p = g.promised
            ax.plot(
                [p["fpr"]],
                [p["tpr"]],
                marker="D",
                markerfacecolor="white",
                color=colour,
                markersize=6,
                linestyle="none",
                label=f"{g.group} promised",
            )
            if realized:
                ax.annotate(
                    "",
                    xy=(fpr.value, tpr.value),
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
    return fig


def _reliability_figure(version: VersionSection) -> Figure | None:
    """Observed outcome rate against mean score per bin, one panel per group."""
    rows = [
        c for c in version.calibration if any(b.observed.value is not None for b in c.reliability)
    ]
    if not rows:
        return None
    cols = min(3, len(rows))
    nrows = math.ceil(len(rows) / cols)
    fig, axes = _figure(7.6, 2.3 * nrows, nrows, cols)
    for ax in axes.flat[len(rows) :]:
        ax.set_visible(False)
    for ax, c in zip(axes.flat, rows, strict=False):
        ax.plot([0, 1], [0, 1], color="#bbb", linewidth=0.8, linestyle=":")
        for b in c.reliability:
            e = b.observed
            if e.value is None or b.mean_score is None:
                continue
            ax.errorbar(
                [b.mean_score],
                [e.value],
                yerr=_err(e),
                fmt="o",
                color=_colour(0),
                capsize=2,
                markersize=3,
            )
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1)
        ax.set_title(f"{c.group} ({c.status})", fontsize=8, loc="left")
        ax.set_xlabel("mean score in bin", fontsize=7)
        ax.set_ylabel("observed rate", fontsize=7)
    fig.tight_layout()
    return fig


def _monitor_figure(m: MonitorRow) -> Figure | None:
    """The monthly estimates with their intervals, and the charts' statistics with limits."""
    shown = [e for e in m.estimates if e.estimate.value is not None]
    has_path = any(s.path for s in m.sides)
    if not shown and not has_path:
        return None
    fig, axes = _figure(7.6, 2.0, 1, 2)
    left, right = axes[0][0], axes[0][1]
    months = m.months
    xs = [months.index(e.month) for e in shown]
    ys = [e.estimate.value for e in shown]
    lo = [e.estimate.low for e in shown]
    hi = [e.estimate.high for e in shown]
    if shown:
        left.fill_between(xs, lo, hi, color=_colour(0), alpha=0.15, linewidth=0)
        left.plot(xs, ys, marker="o", markersize=3, color=_colour(0))
    left.axhline(0 if m.check != "four-fifths" else 0.8, color="#999", linewidth=0.8)
    left.set_title("estimate by month (95% interval)", fontsize=8, loc="left")
    for i, side in enumerate(m.sides):
        if side.path is None:
            continue
        colour = _colour(i + 1)
        right.plot(
            range(len(side.path)),
            side.path,
            marker="o",
            markersize=3,
            color=colour,
            label=f"{side.side} chart",
        )
        right.axhline(side.limit, color=colour, linewidth=0.8, linestyle="--")
    right.set_title("chart statistics; dashed: limits", fontsize=8, loc="left")
    for ax in (left, right):
        ax.set_xticks(range(len(months)), [x[2:] for x in months], rotation=60, fontsize=6)
        ax.grid(axis="y", color="#eee", linewidth=0.6)
    if has_path:
        right.legend(fontsize=6, frameon=False)
    fig.tight_layout()
    return fig


def reliability_chart(version: VersionSection) -> str | None:
    return _draw(_reliability_figure, version)


def monitor_chart(monitor: MonitorRow) -> str | None:
    return _draw(_monitor_figure, monitor)


def rates_chart(version: VersionSection) -> str | None:
    """One panel per rate: each group's point and Wilson 95% interval."""
    return _draw(_rates_figure, version)


def roc_chart(version: VersionSection) -> str | None:
    return _draw(_roc_figure, version)


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


_WITHHELD_TEXT = {
    "small-cell": "withheld",
    "not-identifiable": "not-identifiable",
    "no-cases": "no-cases",
    "pending": "pending",
}
"""What the page shows for a figure without a number: the CSV's note (docs/audit.md, "CSV"),
except that a small-cell figure reads "withheld", as withheld counts do."""


def _fmt_estimate(e: Estimate | None, signed: bool = False) -> str:
    """A figure and, in small type below it, its 95% interval (or why there is no number)."""
    if e is None:
        return "reference"
    if e.value is None or e.low is None or e.high is None:
        return _WITHHELD_TEXT.get(e.withheld or "", "\u2013")
    f = "+.3f" if signed else ".3f"
    sep = " to " if signed else "\u2013"
    return Markup(f'{e.value:{f}}<br><span class="ci">{e.low:{f}}{sep}{e.high:{f}}</span>')


def _fmt_p(value: float | None) -> str:
    if value is None:
        return "\u2013"
    return "<0.0001" if value < 1e-4 else f"{value:.4f}"


@functools.cache
def _environment() -> Environment:
    """The report's template environment, made on first use (nothing is done on import)."""
    env = Environment(
        loader=PackageLoader("service.audit", "templates"),
        autoescape=select_autoescape(["html", "j2"]),
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["fmt"] = _fmt
    env.filters["count"] = _fmt_count
    env.filters["estimate"] = _fmt_estimate
    env.filters["gap"] = lambda e: _fmt_estimate(e, signed=True)
    env.filters["pvalue"] = _fmt_p
    env.globals["labels"] = METRIC_LABELS
    return env


def to_html(snapshot: Snapshot) -> str:
    charts = {
        v.version: {
            "rates": rates_chart(v),
            "roc": roc_chart(v),
            "reliability": reliability_chart(v),
            "monitors": {m.key: monitor_chart(m) for m in v.monitoring},
        }
        for v in snapshot.versions
    }
    undecided: dict[tuple[int, str], int] = {}
    for v in snapshot.versions:
        for c in v.checks:
            if c.status not in ("breach", "holds", "undecided"):
                undecided[(v.version, c.status)] = undecided.get((v.version, c.status), 0) + 1
    return (
        _environment()
        .get_template("report.html.j2")
        .render(
            s=snapshot,
            charts=charts,
            untested=sorted(undecided.items()),
            # The favourable rate is the action rate or its complement; overrides have their own
            # table: leaving them out keeps the table within a printed page.
            table_rates=[m for m in RATE_METRICS if m not in ("favourable_rate", "override_rate")],
            gap_metrics=GAP_METRICS,
        )
    )
