"""``evenhand keys create|revoke|list``: API keys, directly on the database.

``create`` prints the token once, alone on the last line of its output, so a script can take
it with ``tail -n 1``; only its hash is stored.
"""

from __future__ import annotations

import argparse
from typing import Any

from service.cli.common import CliError
from service.errors import ServiceError
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
    r = ksub.add_parser("revoke", help="revoke a key: its token stops working at once")
    r.add_argument("--name", required=True)
    r.set_defaults(handler=revoke)
    ls = ksub.add_parser("list", help="list keys (never their tokens)")
    ls.set_defaults(handler=list_all)


def _factory() -> Any:
    return create_session_factory(create_db_engine(Settings()))


def create(args: argparse.Namespace) -> int:
    with _factory()() as session:
        try:
            key, token = keys.create_key(session, args.name, args.role)
            session.commit()
        except ServiceError as exc:
            raise CliError(exc.message) from None
    print(f"created {key.role} key {key.name!r}; the token is shown only once:")
    print(token)
    return 0


def revoke(args: argparse.Namespace) -> int:
    with _factory()() as session:
        try:
            key = keys.revoke_key(session, args.name)
            session.commit()
        except ServiceError as exc:
            raise CliError(exc.message) from None
    print(f"revoked {key.role} key {key.name!r}")
    return 0


def list_all(args: argparse.Namespace) -> int:
    with _factory()() as session:
        for key in keys.list_keys(session):
            state = "revoked" if key.revoked_at else "active"
            print(f"{key.name}\t{key.role}\t{state}\tcreated {key.created_at:%Y-%m-%d %H:%M}")
    return 0
