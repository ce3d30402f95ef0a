"""Audit every policy's matured months that have no mature snapshot yet.

For each policy, the months with decisions from its first decision to the last ended month
(in the configured time zone) are candidates, minus months purged by retention and months
that already have a snapshot whose maturity is ``mature``. Each candidate is audited with
:func:`service.audit.job.run_audit` (the function ``evenhand audit run`` and ``POST
/v1/audits`` call, with each version's own settings); a month that turns out not to be mature
yet is not stored (its transaction is rolled back) and is tried again on the next run, so a
daily schedule writes one snapshot per month, once it is mature.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Literal

from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.audit.job import run_audit
from service.audit.month import Month
from service.errors import ServiceError
from service.store.audit_models import AuditSnapshot
from service.store.models import PolicyVersion, Recommendation
from service.store.retention import purged_through_month

Outcome = Literal["stored", "not-mature", "empty", "failed"]
ACTOR = "scheduler"


@dataclass(frozen=True)
class DueResult:
    policy: str
    month: Month
    outcome: Outcome
    detail: str


def candidate_months(session: Session, time_zone: str, now: datetime) -> list[tuple[str, Month]]:
    """(policy, month) pairs to audit, oldest first within each policy."""
    last = Month.containing(now, time_zone).shifted(-1)
    purged = purged_through_month(session)
    state = AuditSnapshot.content[("maturity", "state")].as_string()
    done = {
        (policy, month)
        for policy, month in session.execute(
            select(AuditSnapshot.policy, AuditSnapshot.month).where(state == "mature").distinct()
        )
    }
    pairs: list[tuple[str, Month]] = []
    names = select(PolicyVersion.name).distinct().order_by(PolicyVersion.name)
    for policy in session.scalars(names):
        first = session.scalar(
            select(func.min(Recommendation.issued_at)).where(Recommendation.policy == policy)
        )
        if first is None:
            continue
        month = Month.containing(first, time_zone)
        while month <= last:
            if (
                (purged is None or month > purged)
                and (policy, str(month)) not in done
                and _has_decisions(session, policy, month, time_zone)
            ):
                pairs.append((policy, month))
            month = month.shifted(1)
    return pairs


def _has_decisions(session: Session, policy: str, month: Month, time_zone: str) -> bool:
    start, end = month.bounds(time_zone)
    found = session.scalar(
        select(Recommendation.id)
        .where(
            Recommendation.policy == policy,
            Recommendation.issued_at >= start,
            Recommendation.issued_at < end,
        )
        .limit(1)
    )
    return found is not None


def audit_due(
    factory: sessionmaker[Session],
    time_zone: str,
    *,
    now: datetime | None = None,
    report: Callable[[DueResult], None] = lambda _r: None,
) -> list[DueResult]:
    """Audit every due month; each month in a session (and transaction) of its own."""
    now = now or datetime.now(UTC)
    with factory() as session:
        pairs = candidate_months(session, time_zone, now)
    results: list[DueResult] = []
    for policy, month in pairs:
        result = _audit_one(factory, policy, month, time_zone, now)
        report(result)
        results.append(result)
    return results


def _audit_one(
    factory: sessionmaker[Session], policy: str, month: Month, time_zone: str, now: datetime
) -> DueResult:
    with factory() as session:
        try:
            run = run_audit(session, policy, month, time_zone=time_zone, actor=ACTOR, now=now)
        except ServiceError as exc:
            session.rollback()
            outcome: Outcome = "empty" if exc.code == "empty_month" else "failed"
            return DueResult(policy, month, outcome, exc.message)
        snapshot = run.snapshot
        if snapshot.maturity.state != "mature":
            session.rollback()  # not stored: tried again on the next run
            return DueResult(policy, month, "not-mature", snapshot.maturity.reason)
        session.commit()
        return DueResult(
            policy,
            month,
            "stored",
            f"snapshot {run.snapshot_id}, {len(snapshot.alerts)} alert(s), digest "
            f"{snapshot.digest[:16]}",
        )
