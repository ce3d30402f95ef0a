"""Entry point of the ``evenhand`` command: one sub-command module per concern."""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence
from typing import TYPE_CHECKING, TypeGuard

from service.cli.common import USER_ERROR_EXIT, refusal_line

if TYPE_CHECKING:
    from pydantic import ValidationError

COMMANDS: dict[str, tuple[str, str]] = {
    "serve": ("service.cli.serve", "run the HTTP API"),
    "migrate": ("service.cli.migrate", "apply database migrations"),
    "keys": ("service.cli.keys", "create, revoke and list API keys"),
    "policy": (
        "service.cli.policy",
        "submit, approve, activate, roll back and inspect policy versions",
    ),
    "log": ("service.cli.log", "seal, verify and prove the tamper-evident log"),
    "demo": (
        "service.cli.demo",
        "run the Fernhollow demo: policy lifecycle, scoring over HTTP, sealed log",
    ),
    "demo-data": (
        "service.cli.demo_data",
        "write synthetic Fernhollow discharges (calibration data) to a CSV file",
    ),
    "derive": (
        "service.cli.derive",
        "derive a policy from calibration data under a parity criterion",
    ),
    "score": (
        "service.cli.score_csv",
        "score a CSV file of cases into a CSV file of decisions (streamed, recorded)",
    ),
    "schema": (
        "service.cli.schema",
        "the policy document's JSON Schema (service/policies/schema.json)",
    ),
    "audit": ("service.cli.audit", "audit realized rates for one policy and month"),
    "jobs": (
        "service.cli.jobs",
        "scheduled work: audit matured months; the job runner (sealing and audits)",
    ),
    "report": ("service.cli.report", "list, show and export audit report snapshots"),
    "warnings": (
        "service.cli.warnings",
        "one day's score drift and action-rate warnings (before outcomes arrive)",
    ),
}
"""Each command's module and one-line help. Only the chosen command's module is imported, so
``evenhand --help`` and light commands do not load the statistics and the web stack
(``tests/test_cli_start.py`` holds the help lines equal to what the modules register)."""


def _chosen(argv: Sequence[str]) -> str | None:
    """The command named in ``argv`` (its first word that is not an option), if any."""
    return next((word for word in argv if not word.startswith("-")), None)


def build_parser(argv: Sequence[str] | None = None) -> argparse.ArgumentParser:
    """The parser; with ``argv``, only the chosen command's arguments are built (``None``
    builds every command's, for the documentation and the tests)."""
    parser = argparse.ArgumentParser(
        prog="evenhand",
        description="Evenhand: governed decision policies, a keyed scoring API and parity audits.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    chosen = None if argv is None else _chosen(argv)
    for name, (module_name, help_text) in COMMANDS.items():
        if argv is None or name == chosen:
            importlib.import_module(module_name).register(sub)
        else:
            sub.add_parser(name, help=help_text)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    words = list(sys.argv[1:] if argv is None else argv)
    from service.errors import ServiceError
    from service.log.key_errors import SigningKeyError

    try:
        # Values parsed at the edge (a month, a tolerance) are argparse types: a refusal
        # while parsing is reported like any other.
        args = build_parser(words).parse_args(words)
        result: int = args.handler(args)
    except ServiceError as exc:  # every refusal (the CLI's, the service's, the engine's)
        print(refusal_line(exc), file=sys.stderr)
        return USER_ERROR_EXIT
    except SigningKeyError as exc:  # missing, unreadable or weak: say which, in one line
        print(f"evenhand: error: {exc}", file=sys.stderr)
        return USER_ERROR_EXIT
    except Exception as exc:
        if not _is_validation_error(exc):
            raise
        for error in exc.errors():  # a setting out of bounds (EVENHAND_...)
            where = ".".join(str(part) for part in error["loc"]) or exc.title
            print(f"evenhand: error: {where}: {error['msg']}", file=sys.stderr)
        return USER_ERROR_EXIT
    return result


def _is_validation_error(exc: Exception) -> TypeGuard[ValidationError]:
    """Whether ``exc`` is pydantic's: looked up only once raised, so that ``--help`` and the
    light commands never import pydantic."""
    pydantic = sys.modules.get("pydantic")
    return pydantic is not None and isinstance(exc, pydantic.ValidationError)


if __name__ == "__main__":
    sys.exit(main())
