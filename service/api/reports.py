"""Audit runs and report snapshots (audit role).

``POST /v1/audits`` runs the audit of one policy and month and stores a new snapshot.
``GET /v1/reports/{policy}`` lists months and snapshots; ``GET /v1/reports/{policy}/{YYYY-MM}``
returns the latest snapshot as JSON, and with ``.csv`` or ``.html`` appended the same snapshot
rendered (``?snapshot=ID`` picks an earlier one; ``?view=internal`` the unsuppressed view).
"""

from __future__ import annotations

import json
import re
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Query, Response
from pydantic import BaseModel, ConfigDict, Field

from service.api.deps import AppSettings, AuditKey, DbSession, ReadSession
from service.api.errors import error_responses
from service.api.fields import INT32_MAX, MonthField, PolicyName, PolicyPath
from service.audit.history import history_csv, history_rows, load_snapshots
from service.audit.job import run_audit
from service.audit.month import Month
from service.audit.render_csv import to_csv
from service.audit.render_html import to_html
from service.audit.reports import get_snapshot, list_reports
from service.audit.snapshot_model import AlertRow
from service.audit.verdicts import DEFAULT_MIN_COUNT
from service.errors import NotFound
from service.policy.values import GroupKey, Tolerance

router = APIRouter(tags=["audit"], responses=error_responses(401, 403, 404, 422))

_REPORT_FILE = re.compile(r"^(\d{4}-\d{2})(?:\.(json|csv|html))?$")


class AuditRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    policy: PolicyName
    month: MonthField
    reference_group: GroupKey | None = Field(
        default=None,
        description="group every gap is taken against and the four-fifths comparator "
        "(default: each version's own; must be a group of the policy)",
    )
    tolerance: Tolerance | None = Field(
        default=None,
        description="tolerance of every check (default: each version's targets.tolerance)",
    )
    min_count: int = Field(default=DEFAULT_MIN_COUNT, ge=1, le=100_000)
    provisional: bool = Field(
        default=False,
        description="decide checks that need outcomes even if the month is not mature yet "
        "(the report marks them as decided provisionally)",
    )


class AuditResponse(BaseModel):
    snapshot_id: int
    policy: str
    month: str
    digest: str
    versions: list[int]
    maturity: Literal["mature", "provisional"]
    row_counts: dict[str, Any]
    alerts: list[AlertRow]


@router.post(
    "/v1/audits",
    status_code=201,
    response_model=AuditResponse,
    summary="Audit one policy for one calendar month and store a new snapshot",
    responses=error_responses(400, 413),
)
def post_audit(
    body: AuditRequest, session: DbSession, key: AuditKey, settings: AppSettings
) -> AuditResponse:
    run = run_audit(
        session,
        body.policy,
        body.month,
        time_zone=settings.timezone,
        actor=key.name,
        reference_group=body.reference_group,
        tolerance=body.tolerance,
        min_count=body.min_count,
        provisional=body.provisional,
    )
    s = run.snapshot
    return AuditResponse(
        snapshot_id=run.snapshot_id,
        policy=s.policy,
        month=s.month,
        digest=s.digest,
        versions=s.versions_covered,
        maturity=s.maturity.state,
        row_counts=s.row_counts,
        alerts=s.alerts,
    )


@router.get("/v1/reports/{policy}", summary="Months and snapshots of a policy")
def get_reports(policy: PolicyPath, session: ReadSession, _key: AuditKey) -> dict[str, Any]:
    return list_reports(session, policy)


@router.get(
    "/v1/reports/{policy}/history",
    summary="The cross-month view: one row per month x version x group x check",
    response_model=None,
    responses={
        200: {
            "content": {"application/json": {}, "text/csv": {}},
            "description": "Rows from the latest snapshot of each month",
        }
    },
)
def get_history(
    policy: PolicyPath,
    session: ReadSession,
    _key: AuditKey,
    first: Annotated[str, Query(alias="from", pattern=r"^\d{4}-\d{2}$", examples=["2026-01"])],
    last: Annotated[str, Query(alias="to", pattern=r"^\d{4}-\d{2}$", examples=["2026-12"])],
    format: Annotated[Literal["json", "csv"], Query(description="json or csv")] = "json",
    view: Annotated[
        Literal["published", "internal"],
        Query(description="published (small cells suppressed) or internal (every count)"),
    ] = "published",
) -> Response:
    snapshots = load_snapshots(
        session, policy, Month.parse(first, "from"), Month.parse(last, "to"), view
    )
    rows = history_rows(snapshots)
    headers: dict[str, str] = {"X-Evenhand-View": view}
    if format == "csv":
        name = f"{policy}-{first}-{last}-history{'' if view == 'published' else '-internal'}.csv"
        headers["Content-Disposition"] = f'attachment; filename="{name}"'
        return Response(history_csv(rows), media_type="text/csv", headers=headers)
    body = {
        "policy": policy,
        "from": first,
        "to": last,
        "view": view,
        "months": [s.month for s in snapshots],
        "rows": [r.model_dump(mode="json") for r in rows],
    }
    return Response(
        json.dumps(body, ensure_ascii=False), media_type="application/json", headers=headers
    )


@router.get(
    "/v1/reports/{policy}/{month_file}",
    summary="The latest snapshot of a month: YYYY-MM (JSON), YYYY-MM.csv or YYYY-MM.html",
    response_model=None,
    responses={
        200: {
            "content": {"application/json": {}, "text/csv": {}, "text/html": {}},
            "description": "The snapshot, as JSON or rendered",
        },
        **error_responses(409),
    },
)
def get_report(
    policy: PolicyPath,
    month_file: str,
    session: ReadSession,
    _key: AuditKey,
    snapshot: Annotated[int | None, Query(ge=1, le=INT32_MAX, description="a snapshot id")] = None,
    view: Annotated[
        Literal["published", "internal"],
        Query(description="published (small cells suppressed) or internal (every count)"),
    ] = "published",
) -> Response:
    m = _REPORT_FILE.match(month_file)
    if m is None:
        raise NotFound(
            f"{month_file!r} is not a report: use YYYY-MM, YYYY-MM.csv or YYYY-MM.html",
            code="report_not_found",
        )
    month, kind = Month.parse(m.group(1)), m.group(2) or "json"
    content = get_snapshot(session, policy, month, snapshot, view)
    headers = {"X-Evenhand-Digest": content.digest, "X-Evenhand-View": view}
    suffix = "" if view == "published" else "-internal"
    if kind == "csv":
        headers["Content-Disposition"] = f'attachment; filename="{policy}-{month}{suffix}.csv"'
        return Response(to_csv(content), media_type="text/csv", headers=headers)
    if kind == "html":
        return Response(to_html(content), media_type="text/html", headers=headers)
    text = json.dumps(content.content(), indent=2, sort_keys=True, ensure_ascii=False)
    return Response(text, media_type="application/json", headers=headers)
