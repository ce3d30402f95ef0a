"""``evenhand report list|show|export``: stored audit snapshots, from the configured database."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from service.audit.month import Month
from service.audit.render_csv import to_csv
from service.audit.render_html import to_html
from service.audit.reports import View, get_snapshot, list_reports
from service.audit.snapshot_model import Snapshot
from service.cli.common import CliError
from service.errors import ServiceError
from service.settings import Settings
from service.store.db import create_db_engine, create_session_factory

FORMATS = ("json", "csv", "html")


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "report", help="list, show and export audit report snapshots", description=__doc__
    )
    sub = parser.add_subparsers(dest="report_command", required=True, metavar="ACTION")

    listing = sub.add_parser("list", help="months and snapshots of a policy")
    listing.add_argument("--policy", required=True)
    listing.set_defaults(handler=_list)

    show = sub.add_parser("show", help="the alert list and headline figures of a month")
    show.add_argument("--policy", required=True)
    show.add_argument("--month", required=True, help="YYYY-MM")
    show.add_argument("--snapshot", type=int, help="a snapshot id (default: the latest)")
    show.add_argument("--json", action="store_true", help="print the whole snapshot as JSON")
    show.add_argument(
        "--internal",
        action="store_true",
        help="the internal view: every count (not for publication)",
    )
    show.set_defaults(handler=_show)

    export = sub.add_parser("export", help="write a month's report as JSON, CSV or HTML")
    export.add_argument("--policy", required=True)
    export.add_argument("--month", required=True, help="YYYY-MM")
    export.add_argument("--snapshot", type=int, help="a snapshot id (default: the latest)")
    export.add_argument("--format", choices=FORMATS, default="html")
    export.add_argument(
        "--output", "-o", type=Path, help="file to write (default: <policy>-<month>.<format>)"
    )
    export.add_argument(
        "--internal",
        action="store_true",
        help="the internal view: every count (not for publication)",
    )
    export.set_defaults(handler=_export)


def _load(args: argparse.Namespace) -> Snapshot:
    view: View = "internal" if args.internal else "published"
    try:
        month = Month.parse(args.month)
        factory = create_session_factory(create_db_engine(Settings()))
        with factory() as session:
            return get_snapshot(session, args.policy, month, args.snapshot, view)
    except ServiceError as exc:
        raise CliError(exc.message) from None


def to_json(s: Snapshot) -> str:
    return json.dumps(s.content(), indent=2, sort_keys=True, ensure_ascii=False)


def _list(args: argparse.Namespace) -> int:
    factory = create_session_factory(create_db_engine(Settings()))
    with factory() as session:
        listing = list_reports(session, args.policy)
    if not listing["months"]:
        print(f"no audit snapshots of {args.policy!r} yet")
        return 0
    for month in listing["months"]:
        for i, s in enumerate(month["snapshots"]):
            mark = "latest" if i == 0 else "      "
            counts = s["row_counts"]
            print(
                f"{month['month']}  {mark}  snapshot {s['id']:>5}  {s['created_at']}  "
                f"{s['maturity'] or '?':<11}  versions {','.join(map(str, s['versions']))}  "
                f"{counts['recommendations']} recommendations  {s['alerts']} alert(s)  "
                f"{s['digest'][:16]}"
            )
    return 0


def _show(args: argparse.Namespace) -> int:
    s = _load(args)
    if args.json:
        print(to_json(s))
        return 0
    counts = s.row_counts
    if s.view == "internal":
        print("INTERNAL VIEW: small cells are not suppressed; do not publish")
    print(f"{s.policy} {s.month} ({s.time_zone}), versions {s.versions_covered}")
    print(
        f"{counts['recommendations']} recommendations, {counts['outcomes']} outcomes, "
        f"{counts['final_decisions']} final decisions; run {s.created_at}"
    )
    print(f"month {s.maturity.state}: {s.maturity.reason}")
    print(f"{s.family.tests} check(s) tested, {s.family.method} at level {s.family.level:g}")
    print(f"{len(s.alerts)} alert(s):")
    for alert in s.alerts:
        print(f"  [{alert.level}] v{alert.version} {alert.message}")
    print(f"digest {s.digest}")
    return 0


def _export(args: argparse.Namespace) -> int:
    s = _load(args)
    text = {"json": to_json, "csv": to_csv, "html": to_html}[args.format](s)
    suffix = "-internal" if args.internal else ""
    path = args.output or Path(f"{args.policy}-{args.month}{suffix}.{args.format}")
    print(f"rendering {args.format} ...", file=sys.stderr)
    path.write_text(text, encoding="utf-8")
    print(path)
    return 0
