"""``evenhand migrate``: bring the database schema to the latest revision (alembic upgrade)."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from service.cli.common import CliError
from service.settings import Settings


def register(sub: Any) -> None:
    p: argparse.ArgumentParser = sub.add_parser(
        "migrate",
        help="apply database migrations",
        description="Apply the Alembic migrations to EVENHAND_DATABASE_URL.",
    )
    p.add_argument("--revision", default="head", help="target revision (default: head)")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from sqlalchemy.engine import make_url

    from service.store.migrate import upgrade

    settings = Settings()
    shown = make_url(settings.database_url).render_as_string(hide_password=True)
    print(f"evenhand: migrating {shown} to {args.revision}", file=sys.stderr)
    try:
        upgrade(settings.database_url, args.revision)
    except Exception as exc:
        raise CliError(f"migration failed: {type(exc).__name__}: {exc}") from None
    print("evenhand: database is up to date", file=sys.stderr)
    return 0
