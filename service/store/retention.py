"""Retention: purging the personal-data records of the oldest sealed months, the one exception
to the insert-only rule.

A purge through month M deletes the decisions, outcome records and final decisions of every
seal created before the end of M (in the audit's time zone), M being at least the configured
retention (``EVENHAND_RETENTION_MONTHS``, at least six) whole months before the current month.
Everything else is kept: policy versions and lifecycle events, key events, audit snapshots,
tally batches and their tallies, seals, tree nodes and signing keys (governance and
aggregates, no row about a person), so the reports of purged months stay readable.

The purged prefix ends at a seal (the *horizon*), moved back from the latest seal of M when
needed, so that

- every outcome or final decision left in the log still has its decision (a late outcome,
  sealed after the horizon, about a decision before it), and no purged one is about a kept
  decision;
- the purged records are counted in whole tally batches that are themselves sealed: the
  aggregates of the purged months survive, and every later batch can still be recounted from
  its records.

Before anything is deleted the purge recomputes the tree of every seal it purges from the
records and checks the signed root, so evidence of tampering is never purged away unnoticed.
It keeps the leaf hash of every record it deletes (``purged_leaves``: 32 bytes each, a one-way
commitment, not the record), so verification still recomputes every root and proofs of any
kept record still compute. The deletions, the kept hashes and the purge's own record (kind
``purge``, sealed by the next seal) are written in one transaction: the log is never seen
half purged. PostgreSQL lets these DELETEs through only when the transaction has set
``evenhand.purging`` (migration 0070).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime

from sqlalchemy import delete, func, select, text
from sqlalchemy.orm import Session, sessionmaker

from service.audit.month import Month
from service.errors import Conflict, LogInconsistent, Unprocessable
from service.log.audit_records import FINAL, OUTCOME, TALLY_BATCH
from service.log.merkle import TreeBuilder, leaf_hash
from service.log.records import DECISION
from service.store.audit_models import (
    FinalDecision,
    LogPurge,
    OutcomeRecord,
    PurgedLeaves,
    Seal,
    TallyBatch,
)
from service.store.db import begin_read_only
from service.store.log_sources import KIND_ORDER, PURGED_KINDS, SOURCES, TALLIED_KINDS, rows
from service.store.models import Recommendation, utcnow

Progress = Callable[[str], None]

PURGING = "evenhand.purging"
"""The PostgreSQL setting (``SET LOCAL``) under which the insert-only trigger lets a purge's
DELETEs through, and the connection-info key the test suite's guard reads."""


def _quiet(_message: str) -> None:
    return None


def through_of(seal: Seal | None) -> dict[str, int]:
    """Per kind, the last id ``seal`` covers (0 for none, or a kind it has no range of)."""
    if seal is None:
        return dict.fromkeys(KIND_ORDER, 0)
    return {kind: int(seal.ranges.get(kind, [0, 0, 0])[1]) for kind in KIND_ORDER}


def purge_horizon(session: Session) -> int:
    """The last seal any purge row says was purged (0 when none): what the rows in the
    database reflect, sealed or not (verification trusts only sealed purge records)."""
    return int(session.scalar(select(func.coalesce(func.max(LogPurge.through_seal), 0))) or 0)


def purged_through_month(session: Session) -> Month | None:
    """The last month some of whose records a purge deleted (None when nothing was purged)."""
    latest = session.scalar(select(func.max(LogPurge.through_month)))
    return None if latest is None else Month.parse(str(latest))


def latest_purgeable(now: datetime, time_zone: str, retention_months: int) -> Month:
    """The latest month that may be purged at ``now``: ``retention_months`` whole months lie
    between it and the current month, so every record it holds is at least that old."""
    return Month.containing(now, time_zone).shifted(-(retention_months + 1))


@dataclass
class PurgePlan:
    month: Month
    floor: int
    """The horizon of the earlier purges (0: none)."""
    candidate: int
    """The latest seal created before the end of ``month``."""
    through_seal: int = 0
    through_month: str = ""
    counts: dict[str, int] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    @property
    def empty(self) -> bool:
        return self.through_seal <= self.floor


@dataclass(frozen=True)
class PurgeSummary:
    plan: PurgePlan
    purge_id: int | None
    """None for a dry run, or when there was nothing to purge."""


class _Seals:
    """Seals by id, cached, with searches over their (non-decreasing) per-kind throughs."""

    def __init__(self, session: Session) -> None:
        self.session = session
        self._cache: dict[int, dict[str, int]] = {0: through_of(None)}

    def through(self, seal_id: int) -> dict[str, int]:
        if seal_id not in self._cache:
            self._cache[seal_id] = through_of(self.session.get(Seal, seal_id))
        return self._cache[seal_id]

    def last_at_most(self, kind: str, value: int, lo: int, hi: int) -> int:
        """The largest seal id in ``[lo, hi]`` whose ``kind`` through is at most ``value``
        (``lo`` when none is: the caller's floor)."""
        best = lo
        a, b = lo + 1, hi
        while a <= b:
            mid = (a + b) // 2
            if self.through(mid)[kind] <= value:
                best, a = mid, mid + 1
            else:
                b = mid - 1
        return best


def _tallied(through: dict[str, int]) -> dict[str, int]:
    return {k: through[k] for k in TALLIED_KINDS}


def _batch_boundary(session: Session, seals: _Seals, at: int, floor: int, last: int) -> int:
    """The latest seal at or before ``at`` whose tallied records are exactly those of sealed
    tally batches (or no more than the floor's)."""
    target = _tallied(seals.through(at))
    if target == _tallied(seals.through(floor)):
        return at
    sealed_batches = seals.through(last)[TALLY_BATCH]
    for (ranges,) in session.execute(
        select(TallyBatch.ranges)
        .where(TallyBatch.id <= sealed_batches)
        .order_by(TallyBatch.id.desc())
    ):
        ends = {k: int(ranges[k][1]) for k in TALLIED_KINDS}
        if any(ends[k] > target[k] for k in TALLIED_KINDS):
            continue
        if all(ends[k] <= seals.through(floor)[k] for k in TALLIED_KINDS):
            return floor
        seal_id = min(seals.last_at_most(k, ends[k], floor, at) for k in TALLIED_KINDS)
        if _tallied(seals.through(seal_id)) == ends:
            return seal_id
    return floor


def _first_late(session: Session, at: dict[str, int]) -> tuple[str, int, int] | None:
    """An outcome or final decision after the horizon about a decision inside it:
    (kind, its id, the decision's id) with the smallest decision id."""
    found: tuple[str, int, int] | None = None
    for kind, model in ((OUTCOME, OutcomeRecord), (FINAL, FinalDecision)):
        row = session.execute(
            select(model.id, model.recommendation_pk)
            .where(model.id > at[kind], model.recommendation_pk <= at[DECISION])
            .order_by(model.recommendation_pk, model.id)
            .limit(1)
        ).first()
        if row is not None and (found is None or int(row[1]) < found[2]):
            found = (kind, int(row[0]), int(row[1]))
    return found


def _first_ahead(
    session: Session, at: dict[str, int], floor: dict[str, int]
) -> tuple[str, int, int] | None:
    """An outcome or final decision inside the horizon about a decision after it (the
    earliest of each kind): (kind, its id, the decision's id)."""
    found: tuple[str, int, int] | None = None
    for kind, model in ((OUTCOME, OutcomeRecord), (FINAL, FinalDecision)):
        row = session.execute(
            select(model.id, model.recommendation_pk)
            .where(
                model.id > floor[kind],
                model.id <= at[kind],
                model.recommendation_pk > at[DECISION],
            )
            .order_by(model.id)
            .limit(1)
        ).first()
        if row is not None:
            found = (kind, int(row[0]), int(row[1]))
            break
    return found


def plan_purge(session: Session, month: Month, time_zone: str) -> PurgePlan:
    """What a purge through ``month`` would delete now (queries only)."""
    _start, end = month.bounds(time_zone)
    floor = purge_horizon(session)
    last = int(session.scalar(select(func.coalesce(func.max(Seal.id), 0))) or 0)
    first_after = session.scalar(select(func.min(Seal.id)).where(Seal.created_at >= end))
    candidate = last if first_after is None else int(first_after) - 1
    plan = PurgePlan(month, floor, candidate)
    seals = _Seals(session)
    at = candidate
    while at > floor:
        boundary = _batch_boundary(session, seals, at, floor, last)
        if boundary != at:
            plan.notes.append(
                f"horizon moved back from seal {at} to seal {boundary}: the records up to seal "
                f"{at} are not all in sealed tally batches (run `evenhand log seal --tally-now` "
                "to tally and seal them)"
            )
            at = boundary
            continue
        through = seals.through(at)
        late = _first_late(session, through)
        if late is not None:
            kind, record_id, decision = late
            moved = seals.last_at_most(DECISION, decision - 1, floor, at)
            plan.notes.append(
                f"horizon moved back from seal {at} to seal {moved}: {kind} #{record_id}, after "
                f"it, is about decision #{decision}, inside it (a late report)"
            )
            at = moved
            continue
        ahead = _first_ahead(session, through, seals.through(floor))
        if ahead is not None:
            kind, record_id, decision = ahead
            moved = seals.last_at_most(kind, record_id - 1, floor, at)
            plan.notes.append(
                f"horizon moved back from seal {at} to seal {moved}: {kind} #{record_id}, "
                f"inside it, is about decision #{decision}, after it"
            )
            at = moved
            continue
        break
    plan.through_seal = max(at, floor)
    if plan.empty:
        return plan
    horizon = session.get(Seal, plan.through_seal)
    assert horizon is not None
    plan.through_month = str(Month.containing(horizon.created_at, time_zone))
    before, after = seals.through(floor), seals.through(plan.through_seal)
    for kind in PURGED_KINDS:
        t = SOURCES[kind].table
        plan.counts[kind] = int(
            session.scalar(
                select(func.count())
                .select_from(t)
                .where(t.c.id > before[kind], t.c.id <= after[kind])
            )
            or 0
        )
    return plan


def _hash_and_check(session: Session, plan: PurgePlan, progress: Progress) -> list[PurgedLeaves]:
    """The leaf hashes of the records to purge, after checking that every seal they are in
    still gives its signed root from the records (and the earlier purges' kept hashes)."""
    # Imported here: sealing loads the signing code (cryptography), which the audit command,
    # a reader of this module's month check, never needs.
    from service.store.sealing import unpack_frontier

    previous = session.get(Seal, plan.floor) if plan.floor else None
    if previous is None:
        builder = TreeBuilder()
    else:
        builder = TreeBuilder.resume(
            unpack_frontier(int(previous.tree_size), bytes(previous.frontier))
        )
        if builder.root() != bytes(previous.root):
            raise LogInconsistent(
                f"seal {previous.id}'s stored frontier does not give its root: run "
                "`evenhand log verify`; nothing was purged"
            )
    kept: list[PurgedLeaves] = []
    prev_through = through_of(previous)
    for seal_id in range(plan.floor + 1, plan.through_seal + 1):
        seal = session.get(Seal, seal_id)
        if seal is None:
            raise LogInconsistent(f"seal {seal_id} is missing: run `evenhand log verify`")
        through = through_of(seal)
        for kind in KIND_ORDER:
            source = SOURCES[kind]
            hashes = bytearray()
            for row in rows(session, source, prev_through[kind], through[kind]):
                h = leaf_hash(source.encode(row))
                builder.add_leaf_hash(h)
                hashes += h
            if kind in PURGED_KINDS and hashes:
                kept.append(PurgedLeaves(seal_id=seal_id, kind=kind, hashes=bytes(hashes)))
        if builder.count != int(seal.tree_size) or builder.root() != bytes(seal.root):
            raise LogInconsistent(
                f"the records of seal {seal_id} no longer give its signed root: run "
                "`evenhand log verify` to find the record; nothing was purged"
            )
        prev_through = through
        if seal_id % 100 == 0 or seal_id == plan.through_seal:
            progress(f"checked and hashed seal {seal_id} of {plan.through_seal}")
    return kept


def purge(
    factory: sessionmaker[Session],
    month: Month,
    *,
    time_zone: str,
    retention_months: int,
    by: str,
    dry_run: bool = False,
    now: datetime | None = None,
    progress: Progress = _quiet,
) -> PurgeSummary:
    """Purge the personal-data records of the seals created before the end of ``month``
    (moved back as the module says); commits. A dry run only plans."""
    now = now or utcnow()
    allowed = latest_purgeable(now, time_zone, retention_months)
    if month > allowed:
        raise Unprocessable(
            f"{month} is inside the retention period of {retention_months} whole months "
            f"(EVENHAND_RETENTION_MONTHS): the latest month that can be purged now is {allowed}",
            field="through",
            code="within_retention",
        )
    with factory() as session:
        if dry_run:
            begin_read_only(session)
            plan = plan_purge(session, month, time_zone)
            session.rollback()
            return PurgeSummary(plan, None)
        connection = session.connection()
        info = connection.info  # the database connection's own: outlives the commit
        try:
            if connection.dialect.name == "postgresql":
                session.execute(text(f"SET LOCAL {PURGING} = 'on'"))
            info[PURGING] = True
            plan = plan_purge(session, month, time_zone)
            for note in plan.notes:
                progress(note)
            if plan.empty:
                session.rollback()
                return PurgeSummary(plan, None)
            progress(f"purging seals {plan.floor + 1} to {plan.through_seal}")
            kept = _hash_and_check(session, plan, progress)
            session.add_all(kept)
            session.flush()
            before = through_of(session.get(Seal, plan.floor) if plan.floor else None)
            after = through_of(session.get(Seal, plan.through_seal))
            deleted: dict[str, int] = {}
            # Outcomes and final decisions first: they refer to the decisions.
            for kind, model in (
                (FINAL, FinalDecision),
                (OUTCOME, OutcomeRecord),
                (DECISION, Recommendation),
            ):
                result = session.execute(
                    delete(model)
                    .where(model.id > before[kind], model.id <= after[kind])
                    .execution_options(synchronize_session=False)
                )
                deleted[kind] = int(result.rowcount)  # type: ignore[attr-defined]
                progress(f"deleted {deleted[kind]:,} {kind} records")
            if any(deleted[k] != plan.counts[k] for k in PURGED_KINDS):
                raise Conflict(
                    f"the records changed while purging (deleted {deleted}, planned "
                    f"{plan.counts}): nothing was purged; try again",
                    code="purge_conflict",
                )
            record = LogPurge(
                through_seal=plan.through_seal,
                through_month=plan.through_month,
                counts={k: deleted[k] for k in PURGED_KINDS},
                purged_at=now,
                by=by,
            )
            session.add(record)
            session.flush()
            purge_id = int(record.id)
            session.commit()
        except BaseException:
            session.rollback()
            raise
        finally:
            info.pop(PURGING, None)
    return PurgeSummary(plan, purge_id)
