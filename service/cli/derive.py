"""``evenhand derive``: fit a policy to calibration data under one criterion.

Reads the CSV, derives the rules on every row (service.policy.derive), cross-fits every
criterion for honest promises and the price-of-parity table (service.policy.crossfit),
bootstraps the chosen criterion's promises for their standard errors
(service.policy.promise_spread), and
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
from service.cli.common import CliError, tolerance_arg
from service.cli.derive_text import console_table
from service.cli.output import check_targets, write_all
from service.cli.progress import CountBar
from service.policy.crossfit import (
    DEFAULT_FOLDS,
    DEFAULT_FOLDS_SEED,
    assign_folds,
    compare,
    promise_warnings,
)
from service.policy.derive import FRONTIER_TOLERANCES, frontier, solve
from service.policy.derive_document import PolicyIdentity, build_document
from service.policy.derive_report import build_report
from service.policy.document import document_json
from service.policy.errors import InternalDeriveError
from service.policy.promise_spread import (
    DEFAULT_RESAMPLES,
    DEFAULT_RESAMPLES_SEED,
    bootstrap_errors,
)
from service.policy.targets import Criterion
from service.policy.units import DeriveError, DeriveSettings, prepare
from service.policy.values import MAX_TOLERANCE

_SLUG = re.compile(r"^[a-z0-9][a-z0-9._-]{0,63}$")
DEFAULT_MIN_GROUP_SIZE = 50


def _check_non_negative(option: str, value: float) -> None:
    if not (math.isfinite(value) and value >= 0):
        raise CliError(f"{option} {value}: must be a finite number >= 0")


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "derive",
        help="derive a policy from calibration data under a parity criterion",
        description="Fit per-group rules to calibration data (score, outcome, group columns) "
        "minimising expected cost under a criterion; promise cross-fitted rates; compare "
        "every criterion.",
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
    p.add_argument(
        "--tolerance",
        required=True,
        type=tolerance_arg,
        help=f"largest gap that keeps the promise, in (0, {MAX_TOLERANCE}]: between groups "
        "(gap criteria) and between realized and promised rates",
    )
    p.add_argument(
        "--reference-group",
        help="group key (values joined by '|') gaps are taken against and the four-fifths "
        "comparator (default: the highest favourable rate)",
    )
    p.add_argument(
        "--capacity", type=float, help="largest overall action rate, in (0, 1] (default: none)"
    )
    p.add_argument(
        "--folds",
        type=int,
        default=DEFAULT_FOLDS,
        help=f"cross-fitting folds for the promised rates, >= 2 ({DEFAULT_FOLDS})",
    )
    p.add_argument(
        "--folds-seed",
        type=int,
        default=DEFAULT_FOLDS_SEED,
        help=f"seed of the stratified fold split ({DEFAULT_FOLDS_SEED})",
    )
    p.add_argument(
        "--resamples",
        type=int,
        default=DEFAULT_RESAMPLES,
        help="bootstrap resamples for the standard errors of the promised rates, which the "
        f"audit's promise checks are widened by; 0 to skip ({DEFAULT_RESAMPLES})",
    )
    p.add_argument(
        "--resamples-seed",
        type=int,
        default=DEFAULT_RESAMPLES_SEED,
        help=f"seed of the bootstrap resamples ({DEFAULT_RESAMPLES_SEED})",
    )
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
        help="for small groups and groups with one outcome class: the parent group's rule, "
        "one default rule fitted on the pooled groups that use it, or none (an error)",
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


def _check_args(args: argparse.Namespace) -> None:
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
    if args.cost_fp == 0 and args.cost_fn == 0:
        raise CliError("--cost-fp and --cost-fn cannot both be 0")
    if args.capacity is not None and not (math.isfinite(args.capacity) and 0 < args.capacity <= 1):
        raise CliError(f"--capacity {args.capacity}: must be > 0 and <= 1")
    if args.folds < 2:
        raise CliError(f"--folds {args.folds}: must be at least 2")
    if args.resamples != 0 and args.resamples < 2:
        raise CliError(f"--resamples {args.resamples}: must be 0 (skip) or at least 2")
    if args.min_group_size < 1:
        raise CliError("--min-group-size must be at least 1")


def run(args: argparse.Namespace) -> int:
    _check_args(args)
    outputs = [args.out, args.report] + ([args.html] if args.html else [])
    check_targets(outputs)

    _progress(f"reading {args.csv} ...")
    data = load_calibration(args.csv, args.score, args.outcome, args.group)
    ref = args.reference_group
    if ref is not None and ref not in data.group_keys:
        raise CliError(
            f"--reference-group {ref!r} is not a group in the data "
            f"(groups: {', '.join(data.group_keys)})"
        )
    if args.folds > len(data.scores):
        raise CliError(f"--folds {args.folds}: more folds than rows ({len(data.scores)})")
    criterion = Criterion(args.criterion)
    settings = DeriveSettings(
        cost_fp=args.cost_fp,
        cost_fn=args.cost_fn,
        favourable=args.favourable,
        min_group_size=args.min_group_size,
        fallback=args.fallback,
    )
    identity = PolicyIdentity(
        name=args.name or args.out.stem,
        description=args.description,
        score_meaning=args.score_meaning or f"estimated P({args.outcome} = 1)",
        action_label=args.action_label,
        no_action_label=args.no_action_label,
        unknown_groups=args.unknown_groups,
    )
    options: dict[str, Any] = {"capacity": args.capacity, "reference_group": ref}
    try:
        _progress(f"deriving on {len(data.scores)} rows in {len(data.group_keys)} groups ...")
        prepared = prepare(data, settings)
        solution = solve(prepared, criterion, args.tolerance, **options)
        _progress(f"cross-fitting every criterion on {args.folds} folds ...")
        folds = assign_folds(data, args.folds, args.folds_seed)
        comparison = compare(prepared, args.tolerance, folds, args.folds, **options)
        chosen = next(r for r in comparison if r.criterion is criterion)
        if chosen.cross_fitted is None:
            raise DeriveError(chosen.note)
        cross = chosen.cross_fitted
        spread = None
        if args.resamples:
            _progress(
                f"bootstrapping the promises' standard errors ({args.resamples} resamples) ..."
            )
            with CountBar("resamples", unit="resample") as bar:  # drawn on a terminal only
                spread = bootstrap_errors(
                    prepared,
                    criterion,
                    args.tolerance,
                    args.folds,
                    resamples=args.resamples,
                    seed=args.resamples_seed,
                    progress=bar,
                    **options,
                )
            if spread.used < 2:
                why = spread.failures[0] if spread.failures else "no resample succeeded"
                raise DeriveError(f"the bootstrap of the promises failed: {why}")
        policy = build_document(prepared, solution, cross, identity, spread)
        front = frontier(prepared, criterion, FRONTIER_TOLERANCES, **options)
    except InternalDeriveError as exc:
        raise CliError(f"{exc} (a defect in evenhand, not in the data; please report it)") from None
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"])
        raise CliError(f"the derived policy is invalid at {where}: {first['msg']}") from None
    warnings = [
        f"group {key!r} is outside the {criterion.value} promise: it {reason} "
        "(recorded as targets.groups[...].outside_promise)"
        for key, reason in solution.outside_promise.items()
    ]
    warnings += promise_warnings(
        cross, args.tolerance, settings.favourable, ref, solution.outside_promise
    )
    if spread is not None and spread.failures:
        warnings.append(
            f"{len(spread.failures)} of {spread.resamples} bootstrap resamples could not be "
            f"cross-fitted and were left out (first: {spread.failures[0]})"
        )
    report = build_report(
        prepared,
        solution,
        policy,
        comparison,
        front,
        cross=cross,
        folds_seed=args.folds_seed,
        warnings=warnings,
        spread=spread,
        resamples_seed=args.resamples_seed,
    )

    files: dict[Path, bytes] = {
        args.out: _json_bytes(document_json(policy)),
        args.report: _json_bytes(report),
    }
    if args.html:
        from service.reports.derive_html import render_derive_html

        files[args.html] = render_derive_html(
            report, dict(zip(data.group_keys, prepared.curves, strict=True))
        ).encode("utf-8")
    write_all(files)
    print(console_table(report))
    for warning in warnings:
        _progress(f"warning: {warning}")
    _progress("wrote " + ", ".join(str(p) for p in files))
    return 0


def _json_bytes(value: Any) -> bytes:
    return (json.dumps(value, indent=2, ensure_ascii=False, allow_nan=False) + "\n").encode()
