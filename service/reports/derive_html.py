"""The derive report as one self-contained HTML page: tables and inline SVG charts."""

from __future__ import annotations

import io
from typing import Any

import matplotlib
import numpy as np
from jinja2 import Environment, PackageLoader, select_autoescape
from matplotlib.figure import Figure

from service.policy.roc import RocCurve, upper_hull

_MAX_PLOTTED_POINTS = 400


def _svg(fig: Figure) -> str:
    buf = io.StringIO()
    # No date or creator metadata and fixed element ids: the same report gives the same page.
    metadata = {"Creator": None, "Date": None, "Format": None, "Type": None}
    with matplotlib.rc_context({"svg.hashsalt": "evenhand"}):
        fig.savefig(buf, format="svg", bbox_inches="tight", metadata=metadata)
    text = buf.getvalue()
    return text[text.index("<svg") :]  # drop the XML prolog: the SVG sits inside HTML


def _thin(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    if len(x) <= _MAX_PLOTTED_POINTS:
        return x, y
    keep = np.unique(np.linspace(0, len(x) - 1, _MAX_PLOTTED_POINTS).round().astype(int))
    return x[keep], y[keep]


def roc_svg(report: dict[str, Any], curves: dict[str, RocCurve]) -> str:
    keys = list(curves)
    cols = min(3, len(keys))
    rows = (len(keys) + cols - 1) // cols
    # The object interface: no pyplot, so no backend or global state is chosen on import.
    fig = Figure(figsize=(3.2 * cols, 3.2 * rows))
    axes = fig.subplots(rows, cols, squeeze=False)
    for ax, key in zip(axes.flat, keys, strict=False):
        curve = curves[key]
        fx, ty = _thin(curve.fpr, curve.tpr)
        ax.plot(fx, ty, color="#9aa5b1", lw=1, label="ROC")
        hull = upper_hull(curve)
        ax.plot(curve.fpr[hull], curve.tpr[hull], color="#1f4e79", lw=1.2, label="hull")
        ax.plot([0, 1], [0, 1], color="#cccccc", lw=0.8, ls="--")
        g = report["groups"][key]["in_sample"]
        if g["fpr"] is not None and g["tpr"] is not None:
            ax.plot([g["fpr"]], [g["tpr"]], "o", color="#c0392b", label="operating point")
        ax.set_title(key, fontsize=9)
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1)
        ax.set_xlabel("FPR", fontsize=8)
        ax.set_ylabel("TPR", fontsize=8)
        ax.tick_params(labelsize=7)
    for ax in list(axes.flat)[len(keys) :]:
        ax.axis("off")
    axes.flat[0].legend(fontsize=7, loc="lower right")
    fig.tight_layout()
    return _svg(fig)


def frontier_svg(report: dict[str, Any]) -> str:
    points = [p for p in report["frontier"]["points"] if p["expected_cost"] is not None]
    fig = Figure(figsize=(4.5, 3))
    ax = fig.subplots()
    ax.plot(
        [p["tolerance"] for p in points],
        [p["expected_cost"] for p in points],
        "o-",
        color="#1f4e79",
    )
    rows = report["price_of_parity"]["rows"]
    base = next(r for r in rows if r["criterion"] == "max-utility")
    if base["in_sample_cost"] is not None:
        ax.axhline(base["in_sample_cost"], color="#7f8c8d", ls="--", lw=1, label="max-utility")
        ax.legend(fontsize=8)
    ax.set_xlabel("tolerance on every pairwise gap", fontsize=8)
    ax.set_ylabel("in-sample cost per case", fontsize=8)
    ax.set_title(report["frontier"]["criterion"], fontsize=9)
    ax.tick_params(labelsize=7)
    fig.tight_layout()
    return _svg(fig)


def render_derive_html(report: dict[str, Any], curves: dict[str, RocCurve]) -> str:
    env = Environment(
        loader=PackageLoader("service.reports", "templates"),
        autoescape=select_autoescape(["html", "j2"]),
    )
    template = env.get_template("derive.html.j2")
    return template.render(
        report=report, roc_svg=roc_svg(report, curves), frontier_svg=frontier_svg(report)
    )
