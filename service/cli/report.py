"""``evenhand report list|show|export``: stored audit snapshots, from the configured database."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from service.audit.history import history_csv, history_rows, load_snapshots
from service.audit.month import Month
from service.audit.reports import View, get_snapshot, list_reports
from service.audit.snapshot_model import Snapshot
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
    show.add_argument("--month", required=True, type=Month.parse, help="YYYY-MM")
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
    export.add_argument("--month", required=True, type=Month.parse, help="YYYY-MM")
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

    history = sub.add_parser(
        "history",
        help="the cross-month view: one row per month x version x group x check",
    )
    history.add_argument("--policy", required=True)
    history.add_argument(
        "--from", dest="first", required=True, type=Month.parse, help="first month YYYY-MM"
    )
    history.add_argument(
        "--to", dest="last", required=True, type=Month.parse, help="last month YYYY-MM"
    )
    history.add_argument("--format", choices=("table", "csv", "json"), default="table")
    history.add_argument(
        "--internal",
        action="store_true",
        help="the internal view: every count (not for publication)",
    )
    history.set_defaults(handler=_history)


def _load(args: argparse.Namespace) -> Snapshot:
    view: View = "internal" if args.internal else "published"
    factory = create_session_factory(create_db_engine(Settings()))
    with factory() as session:
        return get_snapshot(session, args.policy, args.month, args.snapshot, view)


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
    # Only the renderer asked for is imported: the HTML page loads the statistics, Jinja2 and
    # matplotlib, which JSON and CSV never need.
    if args.format == "csv":
        from service.audit.render_csv import to_csv

        text = to_csv(s)
    elif args.format == "html":
        from service.audit.render_html import to_html

        text = to_html(s)
    else:
        text = to_json(s)
    suffix = "-internal" if args.internal else ""
    path = args.output or Path(f"{args.policy}-{args.month}{suffix}.{args.format}")
    print(f"rendering {args.format} ...", file=sys.stderr)
    path.write_text(text, encoding="utf-8")
    print(path)
    return 0


def _history(args: argparse.Namespace) -> int:
    view: View = "internal" if args.internal else "published"
    factory = create_session_factory(create_db_engine(Settings()))
    with factory() as session:
        snapshots = load_snapshots(session, args.policy, args.first, args.last, view)
    rows = history_rows(snapshots)
    if args.format == "csv":
        sys.stdout.write(history_csv(rows))
        return 0
    if args.format == "json":
        print(json.dumps([r.model_dump(mode="json") for r in rows], indent=2, ensure_ascii=False))
        return 0
    if not rows:
        print(f"no audited months of {args.policy!r} between {args.first} and {args.last}")
        return 0
    if view == "internal":
        print("INTERNAL VIEW: small cells are not suppressed; do not publish")
    print(
        f"{'month':<7}  {'v':>2}  {'check':<11}  {'rate':<16}  {'group':<20}  "
        f"{'status':<16}  {'estimate':>24}  chart"
    )
    for r in rows:
        e = r.estimate
        figure: str
        if e.value is None or e.low is None or e.high is None:
            figure = e.withheld or "-"
        else:
            figure = f"{e.value:+.3f} [{e.low:+.3f}, {e.high:+.3f}]"
        chart = "-"
        if r.chart is not None:
            chart = (
                "SIGNAL since " + (r.chart.first_signal or "?") if r.chart.signal else "in control"
            )
        print(
            f"{r.month:<7}  {r.version:>2}  {r.check:<11}  {r.metric:<16}  {r.group:<20}  "
            f"{r.status:<16}  {figure:>24}  {chart}"
        )
    return 0
