"""``evenhand audit run``: audit one policy for one month, directly on the configured database.

``--every SECONDS`` keeps running: it audits the previous calendar month (in the configured time
zone) at start and then at that interval, writing a new snapshot each time. A cron line does the
same once a month; see docs/audit.md.
"""

from __future__ import annotations

import argparse
import time
from datetime import UTC, datetime
from typing import TYPE_CHECKING

from service.audit.month import Month
from service.cli.common import CliError, tolerance_arg

if TYPE_CHECKING:
    from service.settings import Settings

# The job, the statistics (numpy, scipy.special), SQLAlchemy and the settings are imported
# when the command runs, not when it is parsed: ``evenhand audit run --help`` stays light.

DEFAULT_MIN_COUNT = 20
"""``service.audit.verdicts.DEFAULT_MIN_COUNT``, repeated so that parsing loads no statistics
(``tests/test_cli_start.py`` holds the two equal)."""


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "audit", help="audit realized rates for one policy and month", description=__doc__
    )
    sub = parser.add_subparsers(dest="audit_command", required=True, metavar="ACTION")
    run = sub.add_parser("run", help="count the month in the database and store a snapshot")
    run.add_argument("--policy", required=True, help="policy name")
    run.add_argument(
        "--month",
        type=Month.parse,
        help="calendar month YYYY-MM in the configured time zone (default: the previous month)",
    )
    run.add_argument(
        "--reference",
        help="reference group for gaps and the four-fifths comparator (default: each "
        "version's own)",
    )
    run.add_argument(
        "--tolerance",
        type=tolerance_arg,
        help="tolerance of every check, > 0 and <= 0.5 (default: each version's targets.tolerance)",
    )
    run.add_argument(
        "--provisional",
        action="store_true",
        help="decide checks that need outcomes even if the month is not mature yet",
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


def last_month(time_zone: str, now: datetime | None = None) -> Month:
    return Month.containing(now or datetime.now(UTC), time_zone).shifted(-1)


def _run_once(args: argparse.Namespace, settings: Settings) -> None:
    from service.audit.job import run_audit, stderr_progress
    from service.store.db import create_db_engine, create_session_factory

    month = args.month or last_month(settings.timezone)
    factory = create_session_factory(create_db_engine(settings))
    started = time.perf_counter()
    with factory() as session:
        run = run_audit(
            session,
            args.policy,
            month,
            time_zone=settings.timezone,
            actor="cli",
            reference_group=args.reference,
            tolerance=args.tolerance,
            min_count=args.min_count,
            provisional=args.provisional,
            progress=stderr_progress,
        )
        session.commit()  # the command is the entry point: it commits
    stderr_progress(f"done in {time.perf_counter() - started:.2f} s")
    s = run.snapshot
    print(
        f"snapshot {run.snapshot_id} of {args.policy} for {month} ({s.maturity.state}): "
        f"{len(s.alerts)} alert(s); {s.family.tests} check(s) tested, {s.family.method} at "
        f"{s.family.level:g}"
    )
    for alert in s.alerts:
        print(f"  [{alert.level}] v{alert.version} {alert.message}")
    print(f"digest {s.digest}")


def _run(args: argparse.Namespace) -> int:
    from service.settings import Settings

    settings = Settings()
    if args.min_count < 1:
        raise CliError("--min-count must be at least 1")
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
