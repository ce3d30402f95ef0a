"""``evenhand keys create|revoke|list``: API keys, directly on the database (the operator).

``create`` prints the token once, alone on the last line of its output, so a script can take
it with ``tail -n 1``; only its hash is stored. Creations and revocations are recorded as
key events by the operator (the operating-system account that ran the command).
"""

from __future__ import annotations

import argparse
from typing import Any

from service.settings import Settings
from service.store import keys
from service.store.db import create_db_engine, create_session_factory
from service.store.models import Role


def register(sub: Any) -> None:
    p: argparse.ArgumentParser = sub.add_parser("keys", help="create, revoke and list API keys")
    ksub = p.add_subparsers(dest="keys_command", required=True, metavar="ACTION")
    c = ksub.add_parser("create", help="create a key and show its token once")
    c.add_argument("--role", required=True, choices=[r.value for r in Role])
    c.add_argument("--name", required=True, help="a unique name; shown as the actor in history")
    c.set_defaults(handler=create)
    r = ksub.add_parser("revoke", help="revoke a key: refused by servers within seconds")
    r.add_argument("name", help="the key's name")
    r.add_argument("--reason", required=True, help="why; kept with the revocation")
    r.set_defaults(handler=revoke)
    ls = ksub.add_parser("list", help="list keys: names, roles, created, revoked (never tokens)")
    ls.set_defaults(handler=list_all)


def _factory() -> Any:
    return create_session_factory(create_db_engine(Settings()))


def create(args: argparse.Namespace) -> int:
    with _factory()() as session:
        key, token = keys.create_key(session, args.name, args.role, keys.operator_name())
        session.commit()
    print(f"created {key.role} key {key.name!r}; the token is shown only once:")
    print(token)
    return 0


def revoke(args: argparse.Namespace) -> int:
    with _factory()() as session:
        view = keys.revoke_key(
            session, args.name, args.reason, keys.operator_name(), keep_an_admin=False
        )
        left = keys.live_admin_count(session)
        session.commit()
    at = f"{view.revoked_at:%Y-%m-%d %H:%M:%S}" if view.revoked_at else "?"
    print(f"revoked {view.role} key {view.name!r} (at {at} UTC by {view.revoked_by})")
    if left == 0:
        print("no live admin key is left: create one with `evenhand keys create --role admin`")
    return 0


def list_all(args: argparse.Namespace) -> int:
    with _factory()() as session:
        views = keys.list_keys(session)
    for v in views:
        state = "revoked" if v.revoked else "active"
        line = f"{v.name}\t{v.role}\t{state}\tcreated {v.created_at:%Y-%m-%d %H:%M}"
        if v.revoked_at is not None:
            line += f"\trevoked {v.revoked_at:%Y-%m-%d %H:%M} by {v.revoked_by}: {v.revoke_reason}"
        print(line)
    return 0
