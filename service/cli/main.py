"""Entry point of the ``evenhand`` command: one sub-command module per concern."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from types import ModuleType

from service.cli.common import CliError


def _command_modules() -> list[ModuleType]:
    # Imported here so ``evenhand --help`` stays fast and one broken module names itself.
    from service.cli import (
        audit,
        demo,
        demo_data,
        derive,
        keys,
        log,
        migrate,
        policy,
        report,
        schema,
        serve,
        warnings,
    )

    return [
        serve,
        migrate,
        keys,
        policy,
        log,
        demo,
        demo_data,
        derive,
        schema,
        audit,
        report,
        warnings,
    ]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="evenhand",
        description="Evenhand: governed decision policies, a keyed scoring API and parity audits.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for module in _command_modules():
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from service.errors import ServiceError

    try:
        result: int = args.handler(args)
    except CliError as exc:
        print(f"evenhand: error: {exc}", file=sys.stderr)
        return CliError.exit_code
    except ServiceError as exc:  # what the API answers as 4xx, the CLI says in one line
        print(f"evenhand: error: {exc.message} ({exc.code})", file=sys.stderr)
        return CliError.exit_code
    return result


if __name__ == "__main__":
    sys.exit(main())
