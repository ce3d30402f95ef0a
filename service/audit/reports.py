"""Reading stored report snapshots: the months of a policy, the latest snapshot of a month."""

from __future__ import annotations

from typing import Any, Literal, get_args

from pydantic import ValidationError
from sqlalchemy import select
from sqlalchemy.orm import Session

from service.audit.month import Month
from service.audit.snapshot_model import SNAPSHOT_FORMAT, Snapshot, StatusName
from service.errors import Conflict, NotFound
from service.store.audit_models import AuditSnapshot

View = Literal["published", "internal"]


STATUS_ORDER: tuple[str, ...] = get_args(StatusName)


def status_counts(content: dict[str, Any]) -> dict[str, int]:
    """How many of the snapshot's checks (every version's) have each status, in the order
    of ``StatusName``; statuses no check has are left out."""
    counts = dict.fromkeys(STATUS_ORDER, 0)
    for version in content.get("versions", []):
        for check in version.get("checks", []):
            status = str(check.get("status"))
            counts[status] = counts.get(status, 0) + 1
    return {status: n for status, n in counts.items() if n}


def snapshot_summary(row: AuditSnapshot) -> dict[str, Any]:
    content = row.content
    maturity = content.get("maturity") or {}
    alerts = content.get("alerts", [])
    return {
        "id": row.id,
        "month": row.month,
        "created_at": content["created_at"],
        "created_by": row.created_by,
        "digest": row.digest,
        "format": content.get("format"),
        "versions": list(row.versions),
        "row_counts": content["row_counts"],
        "maturity": maturity.get("state"),
        "alerts": len(alerts),
        "breaches": sum(1 for a in alerts if a.get("level") == "breach"),
        "status_counts": status_counts(content),
        "code_version": row.code_version,
    }


def list_reports(session: Session, policy: str) -> dict[str, Any]:
    """Every month of ``policy`` with its snapshots, newest snapshot first within a month."""
    rows = session.scalars(
        select(AuditSnapshot)
        .where(AuditSnapshot.policy == policy)
        .order_by(AuditSnapshot.month, AuditSnapshot.created_at.desc(), AuditSnapshot.id.desc())
    ).all()
    months: dict[str, list[dict[str, Any]]] = {}
    for row in rows:
        months.setdefault(row.month, []).append(snapshot_summary(row))
    return {
        "policy": policy,
        "months": [{"month": m, "snapshots": s} for m, s in sorted(months.items())],
    }


def get_snapshot(
    session: Session,
    policy: str,
    month: Month,
    snapshot_id: int | None = None,
    view: View = "published",
) -> Snapshot:
    """The latest snapshot of the month, or the one with ``snapshot_id``, in ``view``."""
    query = select(AuditSnapshot).where(
        AuditSnapshot.policy == policy, AuditSnapshot.month == str(month)
    )
    if snapshot_id is not None:
        query = query.where(AuditSnapshot.id == snapshot_id)
    row = session.scalars(
        query.order_by(AuditSnapshot.created_at.desc(), AuditSnapshot.id.desc()).limit(1)
    ).first()
    if row is None:
        if snapshot_id is not None:
            message = f"no snapshot {snapshot_id} of {policy!r} for {month}"
        else:
            message = f"no audit of {policy!r} for {month} yet: run `evenhand audit run` first"
        raise NotFound(message, code="report_not_found")
    content = row.content if view == "published" else row.internal
    if content is None or content.get("format") != SNAPSHOT_FORMAT:
        raise Conflict(
            f"snapshot {row.id} was written in an earlier format ({row.content.get('format')}) "
            f"and has no {view} view in {SNAPSHOT_FORMAT}: run the month's audit again",
            code="snapshot_format",
        )
    try:
        return Snapshot.model_validate(content)
    except ValidationError as exc:  # a stored row that no longer matches its own format
        raise Conflict(
            f"snapshot {row.id} does not match {SNAPSHOT_FORMAT}: {exc.errors()[0]['msg']}",
            code="snapshot_format",
        ) from None
