"""How ``evenhand policy`` reaches the policy store: directly on the database or through the
HTTP API, each made from the command's ``--url``, ``--token-file`` and the environment."""

from __future__ import annotations

import argparse
import os
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


def choose_backend(args: argparse.Namespace) -> Backend:
    url = args.url or os.environ.get("EVENHAND_URL")
    token = _token(args)
    if url:
        if token is None:
            raise CliError("--url " + _NO_TOKEN)
        return HttpBackend(url, token)
    return DirectBackend(token)
