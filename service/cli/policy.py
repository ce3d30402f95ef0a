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
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from service.cli.common import CliError


class HttpBackend:
    def __init__(self, url: str, token: str) -> None:
        import httpx

        self._client = httpx.Client(
            base_url=url.rstrip("/"), headers={"Authorization": f"Bearer {token}"}, timeout=30.0
        )

    def _call(self, method: str, path: str, **kwargs: Any) -> Any:
        import httpx

        try:
            r = self._client.request(method, path, **kwargs)
        except httpx.HTTPError as exc:
            raise CliError(f"cannot reach {self._client.base_url}: {exc}") from None
        if r.status_code >= 400:
            try:
                err = r.json()["error"]
                where = f" ({err['field']})" if err.get("field") else ""
                raise CliError(f"{err['code']}: {err['message']}{where}")
            except (ValueError, KeyError, TypeError):
                raise CliError(f"HTTP {r.status_code}: {r.text[:200]}") from None
        return None if r.status_code == 204 else r.json()

    def submit(self, name: str, document: Any) -> Any:
        return self._call("POST", f"/v1/policies/{name}/versions", json=document)

    def approve(self, name: str, version: int) -> Any:
        return self._call("POST", f"/v1/policies/{name}/versions/{version}/approve")

    def activate(self, name: str, version: int, reason: str | None, expected: int | None) -> Any:
        body = {"version": version, "reason": reason, "expected_current": expected}
        return self._call("POST", f"/v1/policies/{name}/activate", json=body)

    def rollback(self, name: str, reason: str, to_version: int | None, expected: int | None) -> Any:
        body = {"reason": reason, "to_version": to_version, "expected_current": expected}
        return self._call("POST", f"/v1/policies/{name}/rollback", json=body)

    def shadow(self, name: str, version: int | None, expected: int | None) -> Any:
        if version is None:
            params = {"expected_current": expected}
            return self._call("DELETE", f"/v1/policies/{name}/shadow", params=params)
        body = {"version": version, "expected_current": expected}
        return self._call("PUT", f"/v1/policies/{name}/shadow", json=body)

    def history(self, name: str) -> Any:
        return self._call("GET", f"/v1/policies/{name}/history")

    def diff(self, name: str, a: int, b: int) -> Any:
        return self._call("GET", f"/v1/policies/{name}/diff", params={"from": a, "to": b})

    def versions(self, name: str) -> Any:
        return self._call("GET", f"/v1/policies/{name}/versions")

    def version(self, name: str, version: int) -> Any:
        return self._call("GET", f"/v1/policies/{name}/versions/{version}")


class DirectBackend:
    """The same operations on the database; each one is its own committed transaction."""

    def __init__(self, token: str | None) -> None:
        from service.settings import Settings
        from service.store.db import create_db_engine, create_session_factory

        self._factory = create_session_factory(create_db_engine(Settings()))
        self._token = token

    def _run(self, fn: Callable[..., Any], *args: Any, write: bool = False) -> Any:
        from service.store.keys import admin_actor

        with self._factory() as session:
            if write:
                if self._token is None:
                    raise CliError(_NO_TOKEN)
                # The same check as the API's: a live admin key, by its token's hash.
                args = (admin_actor(session, self._token), *args)
            result = fn(session, *args)
            session.commit()
            return result

    def submit(self, name: str, document: Any) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: Any) -> Any:
            view = lifecycle.submit(session, name, document, actor)
            return VersionSummary.of(view).model_dump(mode="json")

        return self._run(op, write=True)

    def approve(self, name: str, version: int) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: Any) -> Any:
            view = lifecycle.approve(session, name, version, actor)
            return VersionSummary.of(view).model_dump(mode="json")

        return self._run(op, write=True)

    def activate(self, name: str, version: int, reason: str | None, expected: int | None) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: Any) -> Any:
            view = lifecycle.activate(
                session, name, version, actor, reason, expected_current=expected
            )
            return VersionSummary.of(view).model_dump(mode="json")

        return self._run(op, write=True)

    def rollback(self, name: str, reason: str, to_version: int | None, expected: int | None) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: Any) -> Any:
            view = lifecycle.rollback(
                session, name, actor, reason, to_version, expected_current=expected
            )
            return VersionSummary.of(view).model_dump(mode="json")

        return self._run(op, write=True)

    def shadow(self, name: str, version: int | None, expected: int | None) -> Any:
        from service.api.policy_schemas import ShadowOut
        from service.store import lifecycle

        def op(session: Any, actor: Any) -> Any:
            if version is None:
                lifecycle.clear_shadow(session, name, actor, expected_current=expected)
                return None
            shadow = lifecycle.set_shadow(session, name, version, actor, expected_current=expected)
            return ShadowOut.of(shadow).model_dump(mode="json")

        return self._run(op, write=True)

    def history(self, name: str) -> Any:
        from service.api.policy_schemas import EventOut
        from service.store import lifecycle

        return self._run(
            lambda s: [EventOut.of(e).model_dump(mode="json") for e in lifecycle.history(s, name)]
        )

    def diff(self, name: str, a: int, b: int) -> Any:
        from service.store import lifecycle

        def op(session: Any) -> Any:
            changes = lifecycle.diff(session, name, a, b)
            return {
                "changes": [c.__dict__ for c in changes],
                "summary": "\n".join(c.text for c in changes) or "no differences",
            }

        return self._run(op)

    def versions(self, name: str) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import policies

        def op(session: Any) -> Any:
            views = policies.version_views(session, name)
            if not views:
                raise CliError(f"unknown_policy: no policy named {name!r}")
            return [VersionSummary.of(v).model_dump(mode="json") for v in views]

        return self._run(op)

    def version(self, name: str, version: int) -> Any:
        from service.api.policy_schemas import VersionDetail
        from service.store import lifecycle

        return self._run(
            lambda s: VersionDetail.of(lifecycle.require_version(s, name, version)).model_dump(
                mode="json"
            )
        )


Backend = HttpBackend | DirectBackend
_NO_TOKEN = (
    "this needs an admin key's token: --token-file PATH (a file holding only the token) or "
    "the EVENHAND_TOKEN environment variable"
)


def _token(args: argparse.Namespace) -> str | None:
    """The admin token from ``--token-file`` (first) or EVENHAND_TOKEN; None if neither."""
    if args.token_file:
        if args.token_file.startswith("eh_"):
            raise CliError(
                "--token-file takes the path of a file holding the token, never the token "
                "itself (it would show in shell history and ps)"
            )
        try:
            text = Path(args.token_file).read_text(encoding="utf-8")
        except OSError as exc:
            raise CliError(f"cannot read --token-file {args.token_file}: {exc.strerror}") from None
        except UnicodeDecodeError:
            raise CliError(f"--token-file {args.token_file} is not a text file") from None
        token = text.strip()
        if not token or len(token.split()) != 1:
            raise CliError(
                f"--token-file {args.token_file} must hold the token alone "
                "(e.g. `evenhand keys create ... | tail -n 1 > FILE`)"
            )
        return token
    env = os.environ.get("EVENHAND_TOKEN", "").strip()
    return env or None


def _backend(args: argparse.Namespace) -> Backend:
    url = args.url or os.environ.get("EVENHAND_URL")
    token = _token(args)
    if url:
        if token is None:
            raise CliError("--url " + _NO_TOKEN)
        return HttpBackend(url, token)
    return DirectBackend(token)


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
    _print_version(_backend(args).submit(name, document))
    return 0


def _approve(args: argparse.Namespace) -> int:
    _print_version(_backend(args).approve(args.name, args.version))
    return 0


def _activate(args: argparse.Namespace) -> int:
    backend = _backend(args)
    _print_version(backend.activate(args.name, args.version, args.reason, args.expect_current))
    return 0


def _rollback(args: argparse.Namespace) -> int:
    backend = _backend(args)
    _print_version(backend.rollback(args.name, args.reason, args.to_version, args.expect_current))
    return 0


def _shadow(args: argparse.Namespace) -> int:
    if args.clear == (args.version is not None):
        raise CliError("give a version to shadow, or --clear")
    if args.clear and args.expect_current is None:
        raise CliError("--clear with --expect-current none: there is nothing to end")
    out = _backend(args).shadow(
        args.name, None if args.clear else args.version, args.expect_current
    )
    print(
        f"{args.name}: no shadow version"
        if out is None
        else f"{args.name}: v{out['version']} is the shadow"
    )
    return 0


def _history(args: argparse.Namespace) -> int:
    for e in _backend(args).history(args.name):
        move = ""
        if e["from_version"] is not None or e["to_version"] is not None:
            a = "-" if e["from_version"] is None else f"v{e['from_version']}"
            b = "-" if e["to_version"] is None else f"v{e['to_version']}"
            move = f" {a} -> {b}"
        why = f": {e['reason']}" if e["reason"] else ""
        print(f"{e['at']}  {e['action']:<9} by {e['actor']}{move}{why}")
    return 0


def _diff(args: argparse.Namespace) -> int:
    out = _backend(args).diff(args.name, args.from_version, args.to_version)
    print(f"{args.name} v{args.from_version} -> v{args.to_version}:")
    for line in out["summary"].splitlines():
        print(f"  {line}")
    return 0


def _show(args: argparse.Namespace) -> int:
    backend = _backend(args)
    if args.version is None:
        for v in backend.versions(args.name):
            _print_version(v)
        return 0
    detail = backend.version(args.name, args.version)
    _print_version(detail)
    print(f"content hash {detail['content_hash']}")
    print(json.dumps(detail["document"], indent=2, ensure_ascii=False))
    return 0
