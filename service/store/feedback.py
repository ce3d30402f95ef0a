"""Recording outcomes and final decisions against logged recommendations.

Rules (the API and the demo go through these functions; callers commit):

- Every outcome is a new, never-changed record. The same outcome again records nothing
  (``unchanged``). A different outcome for a recommendation that has one is a conflict,
  unless it comes as a correction with a reason: then a new record with the reason is added,
  and the latest record counts; the replaced one stays.
- A final decision is recorded once; the same decision again is ``unchanged``, a different one
  a conflict.
- A batch is applied as a whole: every item is checked first, and if any fails nothing is
  written and every failure is reported with its item index.
- An outcome cannot be observed, nor a final decision made, before its recommendation was
  issued or after now; both allow ``clock_skew`` (``EVENHAND_CLOCK_SKEW_SECONDS``) for a
  sender's clock that differs from the server's.
"""

from __future__ import annotations

import uuid
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, Literal

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.errors import (
    BatchRefused,
    Conflict,
    NotFound,
    ServiceError,
    Unprocessable,
    item_problem,
)
from service.log.records import format_timestamp
from service.store.audit_models import FinalDecision, OutcomeRecord
from service.store.id_chunks import key_in, sorted_chunks
from service.store.models import Recommendation, utcnow

DEFAULT_CLOCK_SKEW = timedelta(minutes=5)

Status = Literal["recorded", "unchanged", "corrected"]


@dataclass(frozen=True, slots=True)
class OutcomeReport:
    """One outcome as the case-management or records system sends it."""

    outcome: int
    observed_at: datetime
    source: str
    recommendation_id: str | None = None
    policy: str | None = None
    case_id: str | None = None
    correction_reason: str | None = None


@dataclass(frozen=True, slots=True)
class OutcomeResult:
    recommendation_id: str
    status: Status
    outcome: int
    corrections: int


@dataclass(frozen=True, slots=True)
class _Target:
    pk: int
    recommendation_id: str
    issued_at: datetime
    action: bool


def _target_columns() -> list[Any]:
    r = Recommendation.__table__.c
    return [r.id, r.recommendation_id, r.issued_at, r.action]


class ItemsRefused(BatchRefused):
    """Refused items of :func:`record_outcomes`: each (index, error), for the caller to report
    as a batch (the default) or, for a single outcome, as that item's own error."""

    def __init__(self, failures: list[tuple[int, ServiceError]], total: int) -> None:
        super().__init__([item_problem(i, err) for i, err in failures], total)
        self.failures = failures


def check_timing(
    at: datetime, issued_at: datetime, clock_skew: timedelta, field: str, now: datetime
) -> ServiceError | None:
    """Why ``at`` (an observation or decision about a recommendation issued at ``issued_at``)
    cannot be true, or None: it is before the issue or after ``now``, beyond ``clock_skew``."""
    allowance = f"allowing {clock_skew.total_seconds():g} s for clocks that differ"
    if at > now + clock_skew:
        return Unprocessable(
            f"{field} {format_timestamp(at)} is in the future (the server's clock says "
            f"{format_timestamp(now)}; {allowance})",
            code="in_the_future",
            field=field,
        )
    if at < issued_at - clock_skew:
        return Unprocessable(
            f"{field} {format_timestamp(at)} is before the recommendation was issued "
            f"({format_timestamp(issued_at)}; {allowance})",
            code="before_recommendation",
            field=field,
        )
    return None


def _describe(item: OutcomeReport) -> str:
    if item.recommendation_id is not None:
        return f"recommendation {item.recommendation_id!r}"
    return f"case {item.case_id!r} of policy {item.policy!r}"


def canonical_recommendation_id(text: str) -> str | None:
    """A recommendation_id in its stored form (a lowercase UUID with dashes), or None when
    ``text`` is no UUID at all (then no recommendation has it)."""
    try:
        return str(uuid.UUID(text))
    except ValueError:
        return None


def _resolve(session: Session, items: Sequence[OutcomeReport]) -> list[_Target | None]:
    """The recommendation of each item; None when there is none. A (policy, case_id) pair
    names the latest recommendation issued for that case under that policy."""
    by_id: dict[str, _Target] = {}
    named = {i.recommendation_id for i in items if i.recommendation_id is not None}
    ids = {c for c in map(canonical_recommendation_id, named) if c is not None}
    r = Recommendation.__table__.c
    for chunk in sorted_chunks(ids):
        rows = session.execute(select(*_target_columns()).where(r.recommendation_id.in_(chunk)))
        for row in rows:
            by_id[row.recommendation_id] = _target(row)
    by_case: dict[tuple[str, str], _Target] = {}
    pairs: set[tuple[str, str]] = set()
    for i in items:
        if i.recommendation_id is None and i.policy is not None and i.case_id is not None:
            pairs.add((i.policy, i.case_id))
    for policy in sorted({p for p, _ in pairs}):
        for chunk in sorted_chunks(c for p, c in pairs if p == policy):
            found = session.execute(
                select(*_target_columns(), r.case_id)
                .where(r.policy == policy, r.case_id.in_(chunk))
                .order_by(r.issued_at, r.id)
            )
            for row in found:
                by_case[(policy, row.case_id)] = _target(row)  # the latest wins
    out: list[_Target | None] = []
    for item in items:
        if item.recommendation_id is not None:
            canonical = canonical_recommendation_id(item.recommendation_id)
            out.append(None if canonical is None else by_id.get(canonical))
        else:
            assert item.policy is not None and item.case_id is not None
            out.append(by_case.get((item.policy, item.case_id)))
    return out


def _target(row: Any) -> _Target:
    return _Target(int(row.id), str(row.recommendation_id), row.issued_at, bool(row.action))


@dataclass(slots=True)
class _Current:
    """The outcome that counts for a recommendation now: its latest record's value, and how
    many of its records are corrections."""

    outcome: int
    corrections: int


def _existing(session: Session, pks: Sequence[int]) -> dict[int, _Current]:
    o = OutcomeRecord.__table__.c
    found: dict[int, _Current] = {}
    for chunk in sorted_chunks(pks):
        rows = session.execute(
            select(o.recommendation_pk, o.outcome, o.correction_reason)
            .where(key_in(o.recommendation_pk, chunk))
            .order_by(o.recommendation_pk, o.id)
        )
        for pk, outcome, reason in rows:
            current = found.get(pk)
            corrections = (current.corrections if current else 0) + (reason is not None)
            found[pk] = _Current(int(outcome), corrections)
    return found


def record_outcomes(
    session: Session,
    items: Sequence[OutcomeReport],
    actor: str,
    clock_skew: timedelta = DEFAULT_CLOCK_SKEW,
) -> list[OutcomeResult]:
    """Apply every item or none; raises :class:`ItemsRefused` listing every refused item."""
    now = utcnow()
    targets = _resolve(session, items)
    current = _existing(session, [t.pk for t in targets if t is not None])
    records: list[OutcomeRecord] = []
    results: list[OutcomeResult] = []
    failures: list[tuple[int, ServiceError]] = []
    for index, (item, target) in enumerate(zip(items, targets, strict=True)):
        if target is None:
            failures.append(
                (
                    index,
                    NotFound(
                        f"no recommendation for {_describe(item)}",
                        code="unknown_recommendation",
                        field="recommendation_id" if item.recommendation_id else "case_id",
                    ),
                )
            )
            continue
        late = check_timing(item.observed_at, target.issued_at, clock_skew, "observed_at", now)
        if late is not None:
            failures.append((index, late))
            continue
        row = current.get(target.pk)
        if row is None:
            records.append(
                OutcomeRecord(
                    recommendation_pk=target.pk,
                    outcome=item.outcome,
                    observed_at=item.observed_at,
                    source=item.source,
                    recorded_at=now,
                    recorded_by=actor,
                )
            )
            current[target.pk] = _Current(item.outcome, 0)
            results.append(OutcomeResult(target.recommendation_id, "recorded", item.outcome, 0))
            continue
        if row.outcome == item.outcome:
            results.append(
                OutcomeResult(target.recommendation_id, "unchanged", row.outcome, row.corrections)
            )
            continue
        if not item.correction_reason:
            failures.append(
                (
                    index,
                    Conflict(
                        f"{_describe(item)} already has outcome {row.outcome}; to replace it "
                        "with "
                        f"{item.outcome}, send it as a correction with a reason",
                        code="outcome_conflict",
                        field="outcome",
                    ),
                )
            )
            continue
        records.append(
            OutcomeRecord(
                recommendation_pk=target.pk,
                outcome=item.outcome,
                observed_at=item.observed_at,
                source=item.source,
                correction_reason=item.correction_reason,
                recorded_at=now,
                recorded_by=actor,
            )
        )
        current[target.pk] = row = _Current(item.outcome, row.corrections + 1)
        results.append(
            OutcomeResult(target.recommendation_id, "corrected", item.outcome, row.corrections)
        )
    if failures:
        # Nothing was added to the session; the caller discards it without a commit.
        raise ItemsRefused(failures, len(items))
    session.add_all(records)
    session.flush()
    return results


@dataclass(frozen=True, slots=True)
class FinalReport:
    overridden: bool
    decided_at: datetime
    reason_code: str | None = None
    decided_by: str | None = None


@dataclass(frozen=True, slots=True)
class FinalResult:
    recommendation_id: str
    status: Status
    overridden: bool
    final_action: bool
    reason_code: str | None
    decided_at: datetime


def record_final(
    session: Session,
    recommendation_id: str,
    report: FinalReport,
    actor: str,
    clock_skew: timedelta = DEFAULT_CLOCK_SKEW,
) -> FinalResult:
    r = Recommendation.__table__.c
    canonical = canonical_recommendation_id(recommendation_id)
    found = (
        None
        if canonical is None
        else session.execute(
            select(*_target_columns()).where(r.recommendation_id == canonical)
        ).first()
    )
    if found is None:
        raise NotFound(f"no recommendation {recommendation_id!r}", code="unknown_recommendation")
    target = _target(found)
    now = utcnow()
    late = check_timing(report.decided_at, target.issued_at, clock_skew, "decided_at", now)
    if late is not None:
        raise late
    pk = target.pk
    final_action = target.action != report.overridden
    row = session.scalar(select(FinalDecision).where(FinalDecision.recommendation_pk == pk))
    if row is not None:
        same = (row.overridden, row.reason_code) == (report.overridden, report.reason_code)
        if not same:
            was = "overridden" if row.overridden else "followed"
            raise Conflict(
                f"recommendation {recommendation_id!r} already has a final decision ({was}"
                f"{', reason ' + repr(row.reason_code) if row.reason_code else ''}); it is "
                "recorded once",
                code="final_decision_conflict",
            )
        return FinalResult(
            recommendation_id,
            "unchanged",
            row.overridden,
            row.final_action,
            row.reason_code,
            row.decided_at,
        )
    session.add(
        FinalDecision(
            recommendation_pk=pk,
            overridden=report.overridden,
            final_action=final_action,
            reason_code=report.reason_code,
            decided_at=report.decided_at,
            decided_by=report.decided_by,
            recorded_at=now,
            recorded_by=actor,
        )
    )
    session.flush()
    return FinalResult(
        recommendation_id,
        "recorded",
        report.overridden,
        final_action,
        report.reason_code,
        report.decided_at,
    )
