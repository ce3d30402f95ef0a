"""``evenhand demo``: the Fernhollow story end to end on SQLite, through real HTTP."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from service.cli.common import CliError
from service.demo.audit_stages import full_stages
from service.demo.context import DemoContext, DemoError
from service.demo.fernhollow import DEFAULT_SEED
from service.demo.server import ServerFailed
from service.demo.story import run_demo


def register(sub: Any) -> None:
    p: argparse.ArgumentParser = sub.add_parser(
        "demo",
        help="run the Fernhollow demo: policy lifecycle, scoring over HTTP, sealed log",
        description=(
            "Migrate a fresh SQLite database in the output folder, create keys, submit, "
            "approve and activate the demo policy, start `evenhand serve`, replay synthetic "
            "discharges through HTTP, activate a second version, roll it back, seal and verify "
            "the decision log, report outcomes 30 days on, audit the month, save the report and "
            "print a summary. The data are invented."
        ),
    )
    p.add_argument(
        "--output", type=Path, default=Path("demo-output"), help="folder (replaced on each run)"
    )
    p.add_argument("--cases", type=int, default=2000, help="discharges to replay (default 2000)")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed of the synthetic data")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.cases < 10:
        raise CliError("--cases must be at least 10")
    ctx = DemoContext(output_dir=args.output, cases=args.cases, seed=args.seed)
    try:
        run_demo(ctx, full_stages())
    except (DemoError, ServerFailed) as exc:
        raise CliError(str(exc)) from None
    return 0
