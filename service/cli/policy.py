"""``evenhand policy submit|approve|activate|rollback|shadow|history|diff|show``.

Either directly on the database (``--actor`` names the admin key acting, as in the history)
or through the HTTP API with ``--url`` and ``--token`` (or EVENHAND_URL / EVENHAND_TOKEN).
Both call the same policy-store functions and print the same thing.
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
from service.errors import ServiceError
from service.store.expected import UNCHECKED, Expected, Unchecked


def _with_expected(body: dict[str, Any], expected: Expected) -> dict[str, Any]:
    if not isinstance(expected, Unchecked):
        body["expected_current"] = expected
    return body


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

    def activate(self, name: str, version: int, reason: str | None, expected: Expected) -> Any:
        body = _with_expected({"version": version, "reason": reason}, expected)
        return self._call("POST", f"/v1/policies/{name}/activate", json=body)

    def rollback(self, name: str, reason: str, to_version: int | None, expected: Expected) -> Any:
        body = _with_expected({"reason": reason, "to_version": to_version}, expected)
        return self._call("POST", f"/v1/policies/{name}/rollback", json=body)

    def shadow(self, name: str, version: int | None, expected: Expected) -> Any:
        if version is None:
            if expected is None:
                raise CliError("--clear with --expect-current none: there is nothing to end")
            params = {} if isinstance(expected, Unchecked) else {"expected_current": expected}
            return self._call("DELETE", f"/v1/policies/{name}/shadow", params=params)
        body = _with_expected({"version": version}, expected)
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

    def __init__(self, actor: str | None) -> None:
        from service.settings import Settings
        from service.store.db import create_db_engine, create_session_factory

        self._factory = create_session_factory(create_db_engine(Settings()))
        self._actor = actor

    def _run(self, fn: Callable[..., Any], *args: Any, write: bool = False) -> Any:
        with self._factory() as session:
            try:
                if write:
                    args = (self._admin(session), *args)
                result = fn(session, *args)
                session.commit()
            except ServiceError as exc:
                where = f" ({exc.field})" if exc.field else ""
                raise CliError(f"{exc.code}: {exc.message}{where}") from None
            return result

    def _admin(self, session: Any) -> str:
        from sqlalchemy import select

        from service.store.models import ApiKey, Role

        if not self._actor:
            raise CliError("give --actor NAME (an admin key's name) to change policies directly")
        key = session.scalar(select(ApiKey).where(ApiKey.name == self._actor))
        if key is None or key.revoked_at is not None or key.role != Role.ADMIN.value:
            raise CliError(f"--actor {self._actor!r} is not a live admin key (see `evenhand keys`)")
        return str(key.name)

    def submit(self, name: str, document: Any) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: str) -> Any:
            row = lifecycle.submit(session, name, document, actor)
            return VersionSummary.of(row).model_dump(mode="json")

        return self._run(op, write=True)

    def approve(self, name: str, version: int) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: str) -> Any:
            row = lifecycle.approve(session, name, version, actor)
            return VersionSummary.of(row).model_dump(mode="json")

        return self._run(op, write=True)

    def activate(self, name: str, version: int, reason: str | None, expected: Expected) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: str) -> Any:
            row = lifecycle.activate(session, name, version, actor, reason, expected)
            return VersionSummary.of(row).model_dump(mode="json")

        return self._run(op, write=True)

    def rollback(self, name: str, reason: str, to_version: int | None, expected: Expected) -> Any:
        from service.api.policy_schemas import VersionSummary
        from service.store import lifecycle

        def op(session: Any, actor: str) -> Any:
            row = lifecycle.rollback(session, name, actor, reason, to_version, expected)
            return VersionSummary.of(row).model_dump(mode="json")

        return self._run(op, write=True)

    def shadow(self, name: str, version: int | None, expected: Expected) -> Any:
        from service.api.policy_schemas import ShadowOut
        from service.store import lifecycle

        def op(session: Any, actor: str) -> Any:
            if version is None:
                lifecycle.clear_shadow(session, name, actor, expected)
                return None
            shadow = lifecycle.set_shadow(session, name, version, actor, expected)
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
            rows = policies.list_versions(session, name)
            if not rows:
                raise CliError(f"unknown_policy: no policy named {name!r}")
            return [VersionSummary.of(r).model_dump(mode="json") for r in rows]

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


def _backend(args: argparse.Namespace) -> Backend:
    url = args.url or os.environ.get("EVENHAND_URL")
    if url:
        token = args.token or os.environ.get("EVENHAND_TOKEN")
        if not token:
            raise CliError("--url needs --token (or EVENHAND_TOKEN): an admin key's token")
        return HttpBackend(url, token)
    return DirectBackend(args.actor)


def register(sub: Any) -> None:
    p: argparse.ArgumentParser = sub.add_parser(
        "policy", help="submit, approve, activate, roll back and inspect policy versions"
    )
    psub = p.add_subparsers(dest="policy_command", required=True, metavar="ACTION")

    def add(name: str, help_text: str, handler: Callable[[argparse.Namespace], int]) -> Any:
        c = psub.add_parser(name, help=help_text)
        c.add_argument("--url", help="API base URL (else: work on EVENHAND_DATABASE_URL directly)")
        c.add_argument("--token", help="admin token for --url (or EVENHAND_TOKEN)")
        c.add_argument("--actor", help="admin key name acting, when working on the database")
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
        default=UNCHECKED,
        metavar="VERSION|none",
        help=f"the version you expect to be {what} now: a repeat of a change already made "
        "answers as the first time and changes nothing; if the policy changed meanwhile, "
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
