"""``evenhand jobs``: the scheduled work.

``jobs audit-due`` audits every policy's matured months that have no mature snapshot yet (one
run a day is enough; see docs/operations.md). ``jobs run`` is the long-running job runner of
the compose file: it seals the log every ``--seal-every`` seconds (what ``evenhand log seal``
does) and audits the due months every ``--audit-every`` seconds, writing JSON log lines.
"""

from __future__ import annotations

import argparse
import logging
import logging.config
import sys
import time
from typing import Any

from service.cli.common import CliError
from service.settings import Settings

log = logging.getLogger("evenhand.jobs")


def register(sub: Any) -> None:
    parser: argparse.ArgumentParser = sub.add_parser(
        "jobs",
        help="scheduled work: audit matured months; the job runner (sealing and audits)",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    actions = parser.add_subparsers(dest="jobs_command", required=True, metavar="ACTION")
    due = actions.add_parser(
        "audit-due",
        help="audit every policy's ended, mature months that have no mature snapshot yet",
    )
    due.set_defaults(handler=_audit_due)
    run = actions.add_parser("run", help="seal and audit on a schedule until stopped")
    run.add_argument("--seal-every", type=float, default=60.0, metavar="SECONDS", help="default 60")
    run.add_argument(
        "--audit-every", type=float, default=3600.0, metavar="SECONDS", help="default 3600"
    )
    run.add_argument("--once", action="store_true", help="one round of each job, then exit")
    run.set_defaults(handler=_run)


def _factory(settings: Settings) -> Any:
    from service.store.db import create_db_engine, create_session_factory

    return create_session_factory(create_db_engine(settings))


def _audit_due(args: argparse.Namespace) -> int:
    from service.jobs.due_audits import DueResult, audit_due

    settings = Settings()

    def say(result: DueResult) -> None:
        print(f"{result.policy} {result.month}: {result.outcome}: {result.detail}")

    results = audit_due(_factory(settings), settings.timezone, report=say)
    if not results:
        print("no month is due: every ended month with decisions has a mature snapshot")
    return 1 if any(r.outcome == "failed" for r in results) else 0


def _run(args: argparse.Namespace) -> int:
    from service.jobs.runner import JobRunner
    from service.log.key_errors import SigningKeyError
    from service.observability.json_logs import log_config
    from service.store.signing import signer_from_settings

    if args.seal_every <= 0 or args.audit_every <= 0:
        raise CliError("--seal-every and --audit-every must be positive numbers of seconds")
    settings = Settings()
    logging.config.dictConfig(log_config(json_format=settings.log_format == "json"))
    try:
        signer = signer_from_settings(settings)
    except SigningKeyError as exc:
        raise CliError(str(exc)) from None
    runner = JobRunner(
        _factory(settings),
        signer,
        settings,
        seal_every=args.seal_every,
        audit_every=args.audit_every,
    )
    try:
        if args.once:
            return 0 if runner.round(time.monotonic(), force=True) else 1
        runner.forever()
    except KeyboardInterrupt:
        print("evenhand: job runner stopped", file=sys.stderr)
    return 0
