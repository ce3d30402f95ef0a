"""One stored decision by its recommendation_id, with its outcome and final decision
(queries only; no commits).

The decision is given as the response first sent for it (``DecisionRecord.response_text``: the
same fields and values), plus what the record keeps beside it: the score and the attributes the
policy grouped by, the shadow version's answer, the outcome that counts (the latest report,
with how many corrections it has had) and the person's final decision.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service.errors import NotFound
from service.log.records import DecisionRecord
from service.store.audit_models import FinalDecision, OutcomeRecord
from service.store.feedback import canonical_recommendation_id
from service.store.models import Recommendation
from service.store.policies import policy_names


@dataclass(frozen=True)
class StoredOutcome:
    outcome: int
    observed_at: datetime
    source: str
    corrections: int
    recorded_at: datetime
    recorded_by: str


@dataclass(frozen=True)
class StoredFinal:
    overridden: bool
    final_action: bool
    reason_code: str | None
    decided_at: datetime
    decided_by: str | None
    recorded_at: datetime


@dataclass(frozen=True)
class StoredDecision:
    row_id: int
    """The record's row id in the log (``/v1/log/proofs/inclusion?kind=decision&id=``)."""
    response: dict[str, Any]
    """The response as first sent (the same JSON as a replay of its request)."""
    score: float
    attributes: dict[str, Any]
    shadow_version: int | None
    shadow_probability: float | None
    shadow_action: bool | None
    outcome: StoredOutcome | None
    final: StoredFinal | None


def find_decision(session: Session, recommendation_id: str) -> StoredDecision:
    """The decision with this recommendation_id; 404 ``unknown_recommendation`` if none."""
    canonical = canonical_recommendation_id(recommendation_id)
    row = (
        None
        if canonical is None
        else session.scalars(
            select(Recommendation).where(Recommendation.recommendation_id == canonical)
        ).first()
    )
    if row is None:
        raise NotFound(
            f"no recommendation has the id {recommendation_id!r}", code="unknown_recommendation"
        )
    return _stored(session, row)


MAX_CASE_PAGE = 50
"""The most decisions one page of a case look-up holds."""


@dataclass(frozen=True)
class CasePage:
    decisions: list[StoredDecision]
    """Newest first (by record id: the order they were recorded)."""
    next_before: int | None
    """The record id to ask ``before`` for the next page; None when this is the last."""


def decisions_of_case(
    session: Session,
    case_id: str,
    policy: str | None = None,
    limit: int = 20,
    before: int | None = None,
) -> CasePage:
    """The decisions recorded for ``case_id`` (of ``policy``, or of any policy), newest
    first, at most ``limit`` (1 to ``MAX_CASE_PAGE``), with record ids below ``before``.

    Served by ``ix_recommendations_policy_case_id``: the policy names are listed first and
    the index is searched once per name (a case id alone is not a prefix of any index, and
    a new index would cost every decision's insert). The matches of one case are sorted."""
    limit = max(1, min(limit, MAX_CASE_PAGE))
    names = [policy] if policy is not None else list(policy_names(session))
    if not names:
        return CasePage([], None)
    query = select(Recommendation).where(
        Recommendation.policy.in_(names), Recommendation.case_id == case_id
    )
    if before is not None:
        query = query.where(Recommendation.id < before)
    rows = session.scalars(query.order_by(Recommendation.id.desc()).limit(limit + 1)).all()
    page = [_stored(session, row) for row in rows[:limit]]
    return CasePage(page, page[-1].row_id if len(rows) > limit else None)


def _stored(session: Session, row: Recommendation) -> StoredDecision:
    return StoredDecision(
        row_id=row.id,
        response=json.loads(DecisionRecord.from_stored(row).response_text()),
        score=row.score,
        attributes=dict(row.attributes),
        shadow_version=row.shadow_version,
        shadow_probability=row.shadow_probability,
        shadow_action=row.shadow_action,
        outcome=_outcome(session, row.id),
        final=_final(session, row.id),
    )


def _outcome(session: Session, pk: int) -> StoredOutcome | None:
    reports = OutcomeRecord.recommendation_pk == pk
    latest = session.scalars(
        select(OutcomeRecord).where(reports).order_by(OutcomeRecord.id.desc()).limit(1)
    ).first()
    if latest is None:
        return None
    corrected = reports & OutcomeRecord.correction_reason.is_not(None)
    count = session.scalar(select(func.count()).select_from(OutcomeRecord).where(corrected))
    return StoredOutcome(
        outcome=latest.outcome,
        observed_at=latest.observed_at,
        source=latest.source,
        corrections=int(count or 0),
        recorded_at=latest.recorded_at,
        recorded_by=latest.recorded_by,
    )


def _final(session: Session, pk: int) -> StoredFinal | None:
    row = session.scalars(
        select(FinalDecision).where(FinalDecision.recommendation_pk == pk)
    ).first()
    if row is None:
        return None
    return StoredFinal(
        overridden=row.overridden,
        final_action=row.final_action,
        reason_code=row.reason_code,
        decided_at=row.decided_at,
        decided_by=row.decided_by,
        recorded_at=row.recorded_at,
    )
