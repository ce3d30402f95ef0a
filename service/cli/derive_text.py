"""The derive report as compact plain-text tables for the terminal."""

from __future__ import annotations

from typing import Any


def _fmt(value: float | None, digits: int = 3) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def _rate(r: dict[str, Any]) -> str:
    """A rate with its interval: ``0.303 [0.289, 0.318]``."""
    if r["value"] is None:
        return f"{'-':<20}"
    return f"{r['value']:.3f} [{r['low']:.3f}, {r['high']:.3f}]"


def console_table(report: dict[str, Any]) -> str:
    options = f"tolerance {report['tolerance']:g}"
    if report["reference_group"] is not None:
        options += f", reference {report['reference_group']}"
    if report["capacity"] is not None:
        options += f", capacity {report['capacity']:g}"
    folds = report["folds"]
    lines = [
        f"Policy {report['policy']}: {report['criterion']} ({options}), "
        f"c_FP = {report['costs']['false_positive']:g}, "
        f"c_FN = {report['costs']['false_negative']:g}, {report['rows']} rows",
        f"Promised rates: {folds['k']}-fold cross-fitted (seed {folds['seed']}), "
        "Wilson 95% intervals",
        "",
    ]
    width = max(len("group"), *(len(k) for k in report["groups"]))
    lines.append(
        f"{'group':<{width}}  {'n':>6}  {'prev':>5}  {'action':<20}  {'TPR':<20}  {'FPR':<20}  rule"
    )
    for key, g in report["groups"].items():
        p = g["promised"]
        mark = " *" if g["outside_promise"] else ""
        lines.append(
            f"{key:<{width}}  {g['n']:>6}  {_fmt(g['prevalence'])}  {_rate(p['action_rate'])}  "
            f"{_rate(p['tpr'])}  {_rate(p['fpr'])}  {g['rule']}{mark}"
        )
    low, high = report["expected_cost_interval"]
    lines += [
        "",
        f"cost per case: {report['expected_cost']:.4f} [{low:.4f}, {high:.4f}] cross-fitted, "
        f"{report['in_sample_cost']:.4f} in sample; workload "
        f"{report['workload']['cross_fitted']:.3f} cross-fitted, "
        f"{report['workload']['in_sample']:.3f} in sample",
        "",
        f"{'price of parity':<20}  {'in-sample':>9}  {'cross-fitted [95%]':<24}  "
        f"{'price':>7}  workload in/out",
    ]
    for row in report["price_of_parity"]["rows"]:
        mark = " <" if row["chosen"] else ""
        if row["cross_fitted_cost"] is None:
            crossed = "-"
        else:
            crossed = (
                f"{row['cross_fitted_cost']:.4f} [{row['cross_fitted_low']:.4f}, "
                f"{row['cross_fitted_high']:.4f}]"
            )
        price = "-" if row["price"] is None else f"{row['price']:+.4f}"
        lines.append(
            f"{row['criterion']:<20}  {_fmt(row['in_sample_cost'], 4):>9}  {crossed:<24}  "
            f"{price:>7}  {_fmt(row['workload_in_sample'])}/{_fmt(row['workload_cross_fitted'])}"
            f"{mark}"
        )
    points = report["frontier"]["points"]
    lines += [
        "",
        f"frontier ({report['frontier']['criterion']}, in sample): "
        + ", ".join(f"{p['tolerance']:g} -> {_fmt(p['expected_cost'], 4)}" for p in points),
    ]
    for unit in report["units"]:
        if unit["kind"] in ("parent", "default"):
            lines.append(
                f"{unit['kind']} rule {unit['rule']!r}: fitted on {unit['fitted_on']['rows']} "
                f"rows of {', '.join(unit['fitted_on']['groups'])}; governs "
                f"{', '.join(unit['governs']['groups'])} ({unit['governs']['rows']} rows)"
            )
    for note in report["fallbacks"]:
        lines.append(f"fallback: {note}")
    if any(g["outside_promise"] for g in report["groups"].values()):
        lines.append("* outside the promise: see the warnings and targets.groups[...]")
    lines += ["", "Advisory only; see the cautions in the report."]
    return "\n".join(lines)
