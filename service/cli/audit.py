"""``evenhand audit run``: audit one policy for one month, directly on the configured database.

``--every SECONDS`` keeps running: it audits the previous calendar month (in the configured time
zone) at start and then at that interval, writing a new snapshot each time. A cron line does the
same once a month; see docs/audit.md.
"""

from __future__ import annotations

import argparse
import time
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

from service.audit.job import parse_month, previous_months, run_audit, stderr_progress
from service.cli.common import CliError
from service.errors import ServiceError
from service.policy.statuses import DEFAULT_MIN_COUNT
from service.settings import Settings
from service.store.db import create_db_engine, create_session_factory


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "audit", help="audit realized rates for one policy and month", description=__doc__
    )
    sub = parser.add_subparsers(dest="audit_command", required=True, metavar="ACTION")
    run = sub.add_parser("run", help="count the month in the database and store a snapshot")
    run.add_argument("--policy", required=True, help="policy name")
    run.add_argument(
        "--month",
        help="calendar month YYYY-MM in the configured time zone (default: the previous month)",
    )
    run.add_argument("--reference", help="reference group for gaps (default: the largest)")
    run.add_argument(
        "--tolerance",
        type=float,
        help="tolerance of every check (default: each version's targets.tolerance)",
    )
    run.add_argument(
        "--min-count",
        type=int,
        default=DEFAULT_MIN_COUNT,
        help=f"smallest denominator a status is decided on (default {DEFAULT_MIN_COUNT})",
    )
    run.add_argument(
        "--every",
        type=float,
        metavar="SECONDS",
        help="keep running: audit again at this interval (Ctrl-C stops)",
    )
    run.set_defaults(handler=_run)


def last_month(time_zone: str, now: datetime | None = None) -> str:
    local = (now or datetime.now(UTC)).astimezone(ZoneInfo(time_zone))
    return previous_months(f"{local.year:04d}-{local.month:02d}", 1)[0]


def _run_once(args: argparse.Namespace, settings: Settings) -> None:
    month = args.month or last_month(settings.timezone)
    try:
        parse_month(month)
    except ServiceError as exc:
        raise CliError(exc.message) from None
    factory = create_session_factory(create_db_engine(settings))
    started = time.perf_counter()
    with factory() as session:
        try:
            run = run_audit(
                session,
                args.policy,
                month,
                time_zone=settings.timezone,
                actor="cli",
                reference_group=args.reference,
                tolerance=args.tolerance,
                min_count=args.min_count,
                progress=stderr_progress,
            )
        except ServiceError as exc:
            raise CliError(exc.message) from None
        session.commit()
    stderr_progress(f"done in {time.perf_counter() - started:.2f} s")
    alerts = run.snapshot["alerts"]
    print(f"snapshot {run.snapshot_id} of {args.policy} for {month}: {len(alerts)} alert(s)")
    for alert in alerts:
        print(f"  [{alert['status']}] v{alert['version']} {alert['message']}")
    print(f"digest {run.snapshot['digest']}")


def _run(args: argparse.Namespace) -> int:
    settings = Settings()
    if args.min_count < 1:
        raise CliError("--min-count must be at least 1")
    if args.tolerance is not None and not 0 <= args.tolerance <= 1:
        raise CliError("--tolerance must be between 0 and 1")
    if args.every is None:
        _run_once(args, settings)
        return 0
    if args.every <= 0:
        raise CliError("--every must be a positive number of seconds")
    try:
        while True:
            _run_once(args, settings)
            time.sleep(args.every)
    except KeyboardInterrupt:
        return 0
