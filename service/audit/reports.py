"""Reading stored report snapshots: the months of a policy, the latest snapshot of a month."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.audit.job import parse_month
from service.errors import NotFound
from service.store.audit_models import AuditSnapshot


def snapshot_summary(row: AuditSnapshot) -> dict[str, Any]:
    content = row.content
    return {
        "id": row.id,
        "month": row.month,
        "created_at": content["created_at"],
        "created_by": row.created_by,
        "digest": row.digest,
        "versions": list(row.versions),
        "row_counts": content["row_counts"],
        "alerts": len(content["alerts"]),
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
    session: Session, policy: str, month: str, snapshot_id: int | None = None
) -> dict[str, Any]:
    """The latest snapshot of the month, or the one with ``snapshot_id``."""
    parse_month(month)
    query = select(AuditSnapshot).where(
        AuditSnapshot.policy == policy, AuditSnapshot.month == month
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
    content: dict[str, Any] = row.content
    return content
