"""The console's report pages (audit role): the policies with audits, a policy's months, the
cross-month view per group and check, a month's report and its downloads (JSON, CSV, HTML,
the month bundle). See docs/console.md."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request, Response

from service.console import actions, report_view
from service.console.deps import Who, read_session, require_audit
from service.console.report_view import history_tables
from service.console.web import PREFIX, ConsoleRoute, Month, Name, render
from service.errors import NotFound
from service.store import policies as repo

router = APIRouter(prefix=PREFIX, route_class=ConsoleRoute, include_in_schema=False)


@router.get("/reports")
def report_policies(request: Request, who: Who) -> Response:
    require_audit(who)
    with read_session(request) as session:
        names = list(repo.policy_names(session))
    return render(request, "reports.html", who=who, title="Reports", names=names)


@router.get("/reports/{name}")
def report_months(request: Request, who: Who, name: Name) -> Response:
    from service.audit.reports import list_reports

    require_audit(who)
    with read_session(request) as session:
        listing: dict[str, Any] = list_reports(session, name)
    months = list(reversed(listing["months"]))
    return render(
        request, "report_months.html", who=who, title=f"Reports: {name}", name=name, months=months
    )


@router.get("/reports/{name}/history")
def report_history(
    request: Request, who: Who, name: Name, since: str = "", until: str = ""
) -> Response:
    """The cross-month view: per group and check, each month's estimate, interval, status and
    monitoring chart state (the last 12 months with a snapshot unless a range is asked)."""
    from service.audit.history import MAX_MONTHS, history_rows, load_snapshots
    from service.audit.month import Month as AuditMonth
    from service.audit.reports import list_reports

    require_audit(who)
    with read_session(request) as session:
        stored = [m["month"] for m in list_reports(session, name)["months"]]
        if not stored:
            raise NotFound(f"no audit of {name!r} has been stored yet", code="report_not_found")
        last = AuditMonth.parse(until or stored[-1], "until")
        first = AuditMonth.parse(since, "since") if since else last.shifted(-11)
        snapshots = load_snapshots(session, name, first, last)
    tables = history_tables(history_rows(snapshots))
    return render(
        request,
        "report_history.html",
        who=who,
        title=f"{name}: months {first} to {last}",
        name=name,
        first=str(first),
        last=str(last),
        months=[s.month for s in snapshots],
        tables=tables,
        max_months=MAX_MONTHS,
    )


@router.get("/reports/{name}/{month}")
def report_page(request: Request, who: Who, name: Name, month: Month) -> Response:
    """The month's latest snapshot as a console page (the console's own policy applies)."""
    from service.audit.month import Month as AuditMonth
    from service.audit.reports import get_snapshot

    require_audit(who)
    with read_session(request) as session:
        content = get_snapshot(session, name, AuditMonth.parse(month))
    return render(
        request,
        "report_month.html",
        who=who,
        title=f"{name} {month}",
        name=name,
        page=report_view.report_page(content),
        digest=content.digest,
    )


REPORT_CSP = (
    "default-src 'none'; style-src 'unsafe-inline'; img-src data:; frame-ancestors 'none'; "
    "base-uri 'none'; form-action 'none'; sandbox"
)


@router.get("/reports/{name}/{month}/{kind}")
def report_file(
    request: Request, who: Who, name: Name, month: Month, kind: str, snapshot: int | None = None
) -> Response:
    from service.audit.month import Month as AuditMonth
    from service.audit.reports import get_snapshot

    require_audit(who)
    if kind == BUNDLE_FILE:
        return _bundle(request, name, month)
    if kind not in ("report.html", "report.json", "report.csv"):
        raise NotFound("no such report file: report.html, report.json, report.csv or bundle.ehb")
    with read_session(request) as session:
        content = get_snapshot(session, name, AuditMonth.parse(month), snapshot, "published")
    return actions.report_response(content, name, month, kind, REPORT_CSP)


BUNDLE_FILE = "bundle.ehb"


def _bundle(request: Request, name: str, month: str) -> Response:
    """The month bundle: the same file and code path as ``GET /v1/log/bundle``."""
    from service.api.log import bundle_response
    from service.audit.month import Month as AuditMonth

    with read_session(request) as session:
        return bundle_response(session, name, AuditMonth.parse(month))
