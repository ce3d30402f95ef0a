"""``evenhand demo-data``: the synthetic Fernhollow calibration data, from a seed."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from service.cli.common import CliError
from service.cli.output import check_targets, write_all
from service.demo.fernhollow import DEFAULT_SEED, generate, write_csv


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "demo-data",
        help="write synthetic Fernhollow discharges (calibration data) to a CSV file",
    )
    p.add_argument("--rows", type=int, required=True)
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"default {DEFAULT_SEED}")
    p.add_argument("--out", type=Path, required=True)
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.rows < 1:
        raise CliError("--rows must be at least 1")
    check_targets([args.out])
    discharges = generate(args.rows, seed=args.seed)
    # Write beside the target first, then rename: no half-written file on failure.
    staging = args.out.with_name(f".{args.out.name}.staging")
    try:
        write_csv(discharges, staging)
        write_all({args.out: staging.read_bytes()})
    finally:
        staging.unlink(missing_ok=True)
    print(f"wrote {args.rows} rows (seed {args.seed}) to {args.out}", file=sys.stderr)
    return 0
