"""``evenhand policy submit|approve|activate|rollback|shadow|history|diff|show``.

Either directly on the database or through the HTTP API with ``--url`` (or EVENHAND_URL).
Every change is made with an admin key's token, read from ``--token-file PATH`` or the
EVENHAND_TOKEN environment variable (never from the command line, where shell history and
``ps`` would show it) and checked against the keys table as the API checks it: the change is
attributed to that key, and four-eyes compares keys. Reading (history, diff, show) on the
database needs no token. Both ways call the same policy-store functions and print the same.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from service.cli.common import CliError
from service.cli.policy_backends import choose_backend


def register(sub: Any) -> None:
    p: argparse.ArgumentParser = sub.add_parser(
        "policy", help="submit, approve, activate, roll back and inspect policy versions"
    )
    psub = p.add_subparsers(dest="policy_command", required=True, metavar="ACTION")

    def add(name: str, help_text: str, handler: Callable[[argparse.Namespace], int]) -> Any:
        # No abbreviations: ``--token eh_...`` must not pass for ``--token-file``.
        c = psub.add_parser(name, help=help_text, allow_abbrev=False)
        c.add_argument("--url", help="API base URL (else: work on EVENHAND_DATABASE_URL directly)")
        c.add_argument(
            "--token-file",
            metavar="PATH",
            help="a file holding an admin key's token (else EVENHAND_TOKEN): the key every "
            "change is attributed to; needed for changes, and for everything with --url",
        )
        c.set_defaults(handler=handler)
        return c

    c = add("submit", "store a policy document (JSON file, or - for stdin) as a new draft", _submit)
    c.add_argument("file")
    c.add_argument("--name", help="policy name (default: the document's name)")
    c = add("approve", "approve a draft (four-eyes: not by its author)", _approve)
    c.add_argument("name")
    c.add_argument("version", type=int)
    c = add("activate", "activate an approved version; the active one retires", _activate)
    c.add_argument("name")
    c.add_argument("version", type=int)
    c.add_argument("--reason")
    _add_expect(c, "active")
    c = add("rollback", "re-activate the previous (or --to) version", _rollback)
    c.add_argument("name")
    c.add_argument("--reason", required=True)
    c.add_argument("--to", type=int, dest="to_version")
    _add_expect(c, "active")
    c = add("shadow", "evaluate an approved version beside the active one", _shadow)
    c.add_argument("name")
    c.add_argument("version", type=int, nargs="?")
    c.add_argument("--clear", action="store_true", help="stop shadow evaluation")
    _add_expect(c, "the shadow")
    c = add("history", "every lifecycle event of a policy", _history)
    c.add_argument("name")
    c = add("diff", "what changed between two versions, rule by rule", _diff)
    c.add_argument("name")
    c.add_argument("from_version", type=int)
    c.add_argument("to_version", type=int)
    c = add("show", "the versions of a policy, or one version's document", _show)
    c.add_argument("name")
    c.add_argument("version", type=int, nargs="?")


def _expected_version(text: str) -> int | None:
    if text.lower() == "none":
        return None
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a version number or 'none', got {text!r}"
        ) from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"a version number is at least 1, got {value}")
    return value


def _add_expect(c: argparse.ArgumentParser, what: str) -> None:
    c.add_argument(
        "--expect-current",
        type=_expected_version,
        required=True,
        metavar="VERSION|none",
        help=f"required: the version you expect to be {what} now. A repeat of a change already "
        "made answers as the first time and changes nothing; if the policy changed meanwhile, "
        "nothing happens and the error says what is current",
    )


def _print_version(v: Any) -> None:
    approver = f", approved by {v['approver']}" if v.get("approver") else ""
    print(f"{v['name']} v{v['version']}: {v['status']} (by {v['author']}{approver})")


def _read_document(path: str) -> Any:
    try:
        text = sys.stdin.read() if path == "-" else Path(path).read_text(encoding="utf-8")
        return json.loads(text)
    except OSError as exc:
        raise CliError(f"cannot read {path}: {exc.strerror}") from None
    except json.JSONDecodeError as exc:
        raise CliError(f"{path} is not valid JSON: {exc}") from None


def _submit(args: argparse.Namespace) -> int:
    document = _read_document(args.file)
    name = args.name or (document.get("name") if isinstance(document, dict) else None)
    if not name:
        raise CliError("the document has no name; pass --name")
    _print_version(choose_backend(args).submit(name, document))
    return 0


def _approve(args: argparse.Namespace) -> int:
    _print_version(choose_backend(args).approve(args.name, args.version))
    return 0


def _activate(args: argparse.Namespace) -> int:
    backend = choose_backend(args)
    _print_version(backend.activate(args.name, args.version, args.reason, args.expect_current))
    return 0


def _rollback(args: argparse.Namespace) -> int:
    backend = choose_backend(args)
    _print_version(backend.rollback(args.name, args.reason, args.to_version, args.expect_current))
    return 0


def _shadow(args: argparse.Namespace) -> int:
    if args.clear == (args.version is not None):
        raise CliError("give a version to shadow, or --clear")
    if args.clear and args.expect_current is None:
        raise CliError("--clear with --expect-current none: there is nothing to end")
    out = choose_backend(args).shadow(
        args.name, None if args.clear else args.version, args.expect_current
    )
    print(
        f"{args.name}: no shadow version"
        if out is None
        else f"{args.name}: v{out['version']} is the shadow"
    )
    return 0


def _history(args: argparse.Namespace) -> int:
    for e in choose_backend(args).history(args.name):
        move = ""
        if e["from_version"] is not None or e["to_version"] is not None:
            a = "-" if e["from_version"] is None else f"v{e['from_version']}"
            b = "-" if e["to_version"] is None else f"v{e['to_version']}"
            move = f" {a} -> {b}"
        why = f": {e['reason']}" if e["reason"] else ""
        print(f"{e['at']}  {e['action']:<9} by {e['actor']}{move}{why}")
    return 0


def _diff(args: argparse.Namespace) -> int:
    out = choose_backend(args).diff(args.name, args.from_version, args.to_version)
    print(f"{args.name} v{args.from_version} -> v{args.to_version}:")
    for line in out["summary"].splitlines():
        print(f"  {line}")
    return 0


def _show(args: argparse.Namespace) -> int:
    backend = choose_backend(args)
    if args.version is None:
        for v in backend.versions(args.name):
            _print_version(v)
        return 0
    detail = backend.version(args.name, args.version)
    _print_version(detail)
    print(f"content hash {detail['content_hash']}")
    print(json.dumps(detail["document"], indent=2, ensure_ascii=False))
    return 0
