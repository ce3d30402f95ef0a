"""``evenhand derive``: fit a policy to calibration data under one criterion.

Reads the CSV, derives the rules (service.policy.derive), compares every criterion, and
writes the policy document, the JSON report and optionally an HTML page. Nothing is written
unless everything succeeded.
"""

from __future__ import annotations

import argparse
import json
import math
import re
import sys
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from service.cli.calibration_csv import load_calibration
from service.cli.common import CliError
from service.cli.output import check_targets, write_all
from service.policy.derive import (
    FRONTIER_TOLERANCES,
    DeriveError,
    DeriveSettings,
    PolicyIdentity,
    build_document,
    compare,
    frontier,
    prepare,
    solve,
)
from service.policy.derive_report import build_report
from service.policy.document import Criterion, document_json
from service.policy.holdout import holdout_rates, stratified_split, subset
from service.policy.roc import roc_curve

_SLUG = re.compile(r"^[a-z0-9][a-z0-9._-]{0,63}$")
DEFAULT_MIN_GROUP_SIZE = 50
DEFAULT_HOLDOUT_SEED = 20261201


def _check_non_negative(option: str, value: float) -> None:
    if not (math.isfinite(value) and value >= 0):
        raise CliError(f"{option} {value}: must be a finite number >= 0")


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "derive",
        help="derive a policy from calibration data under a parity criterion",
        description="Fit per-group rules to calibration data (score, outcome, group columns) "
        "minimising expected cost under a criterion; compare every criterion.",
    )
    p.add_argument("csv", type=Path, help="calibration data (CSV with a header row)")
    p.add_argument("--score", required=True, help="column with the score in [0, 1]")
    p.add_argument("--outcome", required=True, help="column with the outcome, 0 or 1")
    p.add_argument(
        "--group", required=True, action="append", help="group column (repeat for an intersection)"
    )
    p.add_argument("--criterion", required=True, choices=[c.value for c in Criterion])
    p.add_argument("--cost-fp", required=True, type=float, help="cost of acting when y=0")
    p.add_argument("--cost-fn", required=True, type=float, help="cost of not acting at y=1")
    p.add_argument("--tolerance", type=float, default=0.0, help="bound on every pairwise gap (0)")
    p.add_argument("--holdout", type=float, help="fraction held out to check the rates (0..1)")
    p.add_argument("--holdout-seed", type=int, default=DEFAULT_HOLDOUT_SEED)
    p.add_argument(
        "--min-group-size",
        type=int,
        default=DEFAULT_MIN_GROUP_SIZE,
        help=f"smaller groups use the fallback ({DEFAULT_MIN_GROUP_SIZE})",
    )
    p.add_argument(
        "--fallback",
        choices=["none", "parent", "default"],
        default="none",
        help="for small groups: the parent group's rule, one default rule fitted on the "
        "pooled small groups, or none (small groups are an error)",
    )
    p.add_argument(
        "--unknown-groups",
        choices=["refuse", "fallback"],
        default="refuse",
        help="whether groups missing from the data may use the fallback when scoring",
    )
    p.add_argument("--favourable", choices=["action", "no-action"], default="action")
    p.add_argument("--name", help="policy name (default: the stem of --out)")
    p.add_argument("--description", default="")
    p.add_argument("--score-meaning", help="what the score estimates")
    p.add_argument("--action-label", default="act")
    p.add_argument("--no-action-label", default="do not act")
    p.add_argument("--out", required=True, type=Path, help="policy document to write (JSON)")
    p.add_argument("--report", required=True, type=Path, help="report to write (JSON)")
    p.add_argument("--html", type=Path, help="also write a self-contained HTML page")
    p.set_defaults(handler=run)


def _progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def run(args: argparse.Namespace) -> int:
    name = args.name or args.out.stem
    if not _SLUG.match(name):
        raise CliError(f"--name {name!r}: use lowercase letters, digits, '.', '_' or '-'")
    for col in args.group:
        if not _SLUG.match(col):
            raise CliError(f"--group {col!r}: attribute names must be lowercase slugs")
    if len(set(args.group)) != len(args.group):
        raise CliError("--group: each column may be named only once")
    _check_non_negative("--cost-fp", args.cost_fp)
    _check_non_negative("--cost-fn", args.cost_fn)
    # Every criterion is met at the chance diagonal, so only a negative tolerance is infeasible.
    if not (math.isfinite(args.tolerance) and args.tolerance >= 0):
        raise CliError(f"--tolerance {args.tolerance}: infeasible, must be a finite number >= 0")
    if args.cost_fp == 0 and args.cost_fn == 0:
        raise CliError("--cost-fp and --cost-fn cannot both be 0")
    if args.holdout is not None and not 0.0 < args.holdout < 1.0:
        raise CliError(f"--holdout {args.holdout}: must be between 0 and 1")
    if args.min_group_size < 1:
        raise CliError("--min-group-size must be at least 1")
    outputs = [args.out, args.report] + ([args.html] if args.html else [])
    check_targets(outputs)

    _progress(f"reading {args.csv} ...")
    data = load_calibration(args.csv, args.score, args.outcome, args.group)
    criterion = Criterion(args.criterion)
    settings = DeriveSettings(
        cost_fp=args.cost_fp,
        cost_fn=args.cost_fn,
        favourable=args.favourable,
        min_group_size=args.min_group_size,
        fallback=args.fallback,
    )
    identity = PolicyIdentity(
        name=name,
        description=args.description,
        score_meaning=args.score_meaning or f"estimated P({args.outcome} = 1)",
        action_label=args.action_label,
        no_action_label=args.no_action_label,
        unknown_groups=args.unknown_groups,
    )
    try:
        fit = data
        held = None
        if args.holdout is not None:
            fit_rows, held_rows = stratified_split(data, args.holdout, args.holdout_seed)
            fit, held = subset(data, fit_rows), subset(data, held_rows)
        _progress(f"deriving on {len(fit.scores)} rows in {len(fit.group_keys)} groups ...")
        prepared = prepare(fit, settings)
        solution = solve(prepared, criterion, args.tolerance)
        policy = build_document(prepared, solution, identity)
        _progress("comparing every criterion and the frontier ...")
        comparison = compare(prepared, args.tolerance)
        front = frontier(prepared, criterion, FRONTIER_TOLERANCES)
        holdout = None
        if held is not None:
            rates, cost = holdout_rates(policy, held)
            holdout = (rates, cost, args.holdout, args.holdout_seed)
    except DeriveError as exc:
        raise CliError(exc.message) from None
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"])
        raise CliError(f"the derived policy is invalid at {where}: {first['msg']}") from None
    report = build_report(prepared, solution, policy, comparison, front, holdout)

    files: dict[Path, bytes] = {
        args.out: _json_bytes(document_json(policy)),
        args.report: _json_bytes(report),
    }
    if args.html:
        from service.reports.derive_html import render_derive_html

        curves = {
            key: roc_curve(fit.scores[rows], fit.outcomes[rows])
            for key, rows in zip(fit.group_keys, prepared.group_rows, strict=True)
        }
        files[args.html] = render_derive_html(report, curves).encode("utf-8")
    write_all(files)
    print(console_table(report))
    _progress("wrote " + ", ".join(str(p) for p in files))
    return 0


def _json_bytes(value: Any) -> bytes:
    return (json.dumps(value, indent=2, ensure_ascii=False, allow_nan=False) + "\n").encode()


def _fmt(value: float | None, digits: int = 3) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def console_table(report: dict[str, Any]) -> str:
    """The report as plain text tables for the terminal."""
    lines = [
        f"Policy {report['policy']}: {report['criterion']} (tolerance {report['tolerance']:g}), "
        f"c_FP = {report['costs']['false_positive']:g}, "
        f"c_FN = {report['costs']['false_negative']:g}, {report['rows']} rows",
        "",
    ]
    width = max(len("group"), *(len(k) for k in report["groups"]))
    lines.append(
        f"{'group':<{width}}  {'n':>7}  {'prev':>5}  {'action':>6}  {'TPR':>5}  {'FPR':>5}  "
        f"{'PPV':>5}  rule"
    )
    for key, g in report["groups"].items():
        lines.append(
            f"{key:<{width}}  {g['n']:>7}  {_fmt(g['prevalence'])}  {_fmt(g['action_rate']):>6}"
            f"  {_fmt(g['tpr'])}  {_fmt(g['fpr'])}  {_fmt(g['ppv'])}  {g['rule']}"
        )
    lines += ["", f"expected cost per case: {report['expected_cost']:.4f}", ""]
    lines.append(f"{'criterion':<20}  {'cost/case':>9}  {'price':>8}")
    for row in report["comparison"]:
        mark = " <" if row["criterion"] == report["criterion"] else ""
        cost = _fmt(row["expected_cost"], 4)
        price = "-" if row["price"] is None else f"{row['price']:+.4f}"
        lines.append(f"{row['criterion']:<20}  {cost:>9}  {price:>8}{mark}")
    points = report["frontier"]["points"]
    lines += [
        "",
        f"frontier ({report['frontier']['criterion']}): "
        + ", ".join(f"{p['tolerance']:g} -> {_fmt(p['expected_cost'], 4)}" for p in points),
    ]
    for note in report["fallbacks"]:
        lines.append(f"fallback: {note}")
    if "holdout" in report:
        h = report["holdout"]
        lines += [
            "",
            f"holdout ({h['rows']} rows, {h['fraction']:g}): expected cost "
            f"{h['expected_cost']:.4f}; Wilson 95% intervals",
        ]
        for key, g in h["groups"].items():
            parts = []
            for metric in ("action_rate", "tpr", "fpr"):
                r = g[metric]
                parts.append(f"{metric} {_fmt(r['value'])} [{_fmt(r['low'])}, {_fmt(r['high'])}]")
            lines.append(f"  {key:<{width}}  n {g['n']:>6}  " + "  ".join(parts))
    lines += ["", "Advisory only; see the cautions in the report."]
    return "\n".join(lines)
