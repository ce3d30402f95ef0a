"""``evenhand warnings``: one day's score drift and action-rate warnings, before outcomes."""

from __future__ import annotations

import argparse
import json
from datetime import UTC, datetime, timedelta

from service.audit.early_warning_job import parse_day, run_day_warnings
from service.audit.month import zone_of
from service.audit.warnings_model import warnings_body
from service.cli.common import CliError
from service.errors import ServiceError
from service.settings import Settings
from service.stats.drift import PSI_MAJOR, PSI_MODERATE
from service.store.db import create_db_engine, create_session_factory


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "warnings",
        help="one day's score drift and action-rate warnings (before outcomes arrive)",
        description=__doc__,
    )
    parser.add_argument("--policy", required=True)
    parser.add_argument("--day", help="YYYY-MM-DD in the configured time zone (default: yesterday)")
    parser.add_argument("--json", action="store_true", help="print the whole result as JSON")
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    settings = Settings()
    try:
        if args.day:
            day = parse_day(args.day)
        else:
            day = (
                datetime.now(UTC).astimezone(zone_of(settings.timezone)) - timedelta(days=1)
            ).date()
        factory = create_session_factory(create_db_engine(settings))
        with factory() as session:
            found = run_day_warnings(session, args.policy, day, settings.timezone)
    except ServiceError as exc:
        raise CliError(exc.message) from None
    body = warnings_body(args.policy, day, settings.timezone, found)
    if args.json:
        print(json.dumps(body.model_dump(mode="json"), indent=2, ensure_ascii=False))
        return 0
    print(
        f"{args.policy} on {day} ({settings.timezone}): {body.warnings} warning(s); "
        f"{body.tests} test(s) at level {body.level:.2g}"
    )
    for d in body.drift:
        if d.status == "drift":
            print(
                f"  [drift] v{d.version} {d.group}: p {d.p_adjusted:.2g} (adjusted), "
                f"PSI {d.psi:.3f} ({psi_band(d.psi)})"
            )
    for a in body.action_rates:
        if a.status == "warning":
            print(f"  [warning] v{a.version} {a.message}")
    return 0


def psi_band(psi: float | None) -> str:
    """The common-practice reading of the index (a description, not a test)."""
    if psi is None:
        return "withheld"
    if psi >= PSI_MAJOR:
        return "major shift by common practice"
    if psi >= PSI_MODERATE:
        return "moderate shift by common practice"
    return "stable by common practice"
