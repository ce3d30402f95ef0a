"""``evenhand schema``: print or write the policy document's JSON Schema."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from service.cli.output import check_targets, write_all
from service.policy.schema import schema_text


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "schema", help="the policy document's JSON Schema (service/policies/schema.json)"
    )
    p.add_argument("--out", type=Path, help="write here instead of standard output")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    text = schema_text()
    if args.out is None:
        sys.stdout.write(text)
    else:
        check_targets([args.out])
        write_all({args.out: text.encode("utf-8")})
    return 0
