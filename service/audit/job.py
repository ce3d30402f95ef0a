"""The audit job: count one policy's month in the database, decide it, store the snapshots.

The job reads counts (:mod:`service.audit.counting`), hands them to the pure assembly
(:mod:`service.audit.snapshot`) and adds one immutable snapshot row. Its caller (the request or
the CLI command) commits. An empty month or one that has not begun is refused, so no snapshot
ever looks clean for lack of data.
"""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service import __version__
from service.audit.counting import Progress, count_month, quiet
from service.audit.monitoring import WINDOW, MonthCounts
from service.audit.month import Month
from service.audit.realized import CellCounts, ScoreSums
from service.audit.snapshot import AuditInput, AuditResult, build
from service.audit.snapshot_model import SNAPSHOT_FORMAT, ScoreSumsRow, Snapshot
from service.audit.tally_views import by_version
from service.audit.verdicts import DEFAULT_MIN_COUNT
from service.audit.version_counts import VersionCounts
from service.errors import LogInconsistent, NotFound, Unprocessable
from service.policy.document import PolicyDocument
from service.stats.calibration import PowerSums
from service.store.audit_models import AuditSnapshot
from service.store.db import begin_read_only
from service.store.models import PolicyVersion
from service.store.retention import purged_through_month


def stderr_progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


@dataclass(frozen=True)
class AuditRun:
    snapshot_id: int
    result: AuditResult

    @property
    def snapshot(self) -> Snapshot:
        return self.result.published


def _load_documents(
    session: Session, policy: str, versions: set[int] | None = None
) -> dict[int, tuple[PolicyDocument, str]]:
    query = select(PolicyVersion.version, PolicyVersion.document, PolicyVersion.content_hash).where(
        PolicyVersion.name == policy
    )
    if versions is not None:
        query = query.where(PolicyVersion.version.in_(sorted(versions)))
    return {int(v): (PolicyDocument.model_validate(doc), h) for v, doc, h in session.execute(query)}


def _check_reference(
    reference_group: str | None, documents: dict[int, tuple[PolicyDocument, str]], seen: set[str]
) -> None:
    if reference_group is None:
        return
    known = set(seen)
    for doc, _ in documents.values():
        known.update(doc.groups.known)
    if reference_group not in known:
        raise Unprocessable(
            f"reference group {reference_group!r} is not a group of this policy "
            f"(known: {', '.join(sorted(known)) or 'none'})",
            field="reference_group",
            code="unknown_group",
        )


@contextmanager
def _reader(session: Session) -> Iterator[Session]:
    """Where the counts are read. A caller without a transaction gets a read-only session of
    its own (on SQLite a WAL snapshot without the write lock, so scoring goes on while a
    month is counted); the caller's session then holds only the short write of the
    snapshot, and its transaction is never begun, ended or rolled back here. A caller
    already in a transaction is read in it (it sees what that transaction wrote)."""
    if session.in_transaction():
        yield session
        return
    with Session(bind=session.get_bind()) as reader:
        begin_read_only(reader)
        yield reader


def _count_and_build(
    reader: Session,
    policy: str,
    month: Month,
    start: datetime,
    end: datetime,
    time_zone: str,
    now: datetime,
    progress: Progress,
    *,
    reference_group: str | None,
    tolerance: float | None,
    min_count: int,
    provisional: bool,
) -> tuple[AuditResult, list[VersionCounts]]:
    known = reader.scalar(select(func.count()).where(PolicyVersion.name == policy))
    if not known:
        raise NotFound(f"unknown policy {policy!r}", code="unknown_policy", field="policy")
    purged = purged_through_month(reader)
    if purged is not None and month <= purged:
        raise Unprocessable(
            f"the decisions of {month} were purged (retention: the log's personal records are "
            f"deleted through {purged}): it can no longer be audited; its snapshots from "
            "before the purge remain readable",
            field="month",
            code="purged_month",
        )
    span = f"{start:%Y-%m-%d %H:%M}Z to {end:%Y-%m-%d %H:%M}Z"
    progress(f"auditing {policy} for {month} ({time_zone}): {span}")
    try:
        per_version = by_version(count_month(reader, policy, start, end, time_zone, progress))
    except (ValueError, TypeError, KeyError) as exc:
        raise LogInconsistent(
            f"the counts of {policy} for {month} contradict each other ({exc}): the log was "
            "damaged or edited; run `evenhand log verify` to find the record"
        ) from None
    if not per_version:
        raise Unprocessable(
            f"no decisions of {policy!r} were issued in {month} ({time_zone}): nothing to audit",
            field="month",
            code="empty_month",
        )
    documents = _load_documents(reader, policy)
    seen = {g for view in per_version.values() for g in view.cells}
    _check_reference(reference_group, documents, seen)
    versions = []
    for v, view in sorted(per_version.items()):
        if v not in documents:
            raise LogInconsistent(
                f"decisions of {policy} name version {v}, which the policy store does not hold: "
                "run `evenhand log verify`"
            )
        document, content_hash = documents[v]
        mode = document.outcome_observed_after
        zones = {g: z.selective(mode) for g, z in view.zones.items()}
        versions.append(
            VersionCounts(
                v,
                document,
                view.cells,
                view.shadows,
                content_hash,
                view.scores,
                {g: c for g, c in zones.items() if c is not None},
            )
        )
    history = month_history(reader, policy, month, {v.version for v in versions})
    result = build(
        AuditInput(
            policy=policy,
            month=month,
            time_zone=time_zone,
            cohort_from=start,
            cohort_until=end,
            created_at=now,
            code_version=__version__,
            versions=versions,
            reference_group=reference_group,
            tolerance=tolerance,
            min_count=min_count,
            provisional=provisional,
            history=history,
        ),
        now,
    )
    return result, versions


def run_audit(
    session: Session,
    policy: str,
    month: Month,
    *,
    time_zone: str = "UTC",
    actor: str = "cli",
    reference_group: str | None = None,
    tolerance: float | None = None,
    min_count: int = DEFAULT_MIN_COUNT,
    provisional: bool = False,
    progress: Progress = quiet,
    now: datetime | None = None,
) -> AuditRun:
    """Audit ``policy`` for ``month`` and add the snapshot (the caller commits)."""
    start, end = month.bounds(time_zone)
    now = now or datetime.now(UTC)
    if start > now:
        raise Unprocessable(
            f"{month} has not begun in {time_zone}: nothing to audit yet",
            field="month",
            code="future_month",
        )
    with _reader(session) as reader:
        result, versions = _count_and_build(
            reader,
            policy,
            month,
            start,
            end,
            time_zone,
            now,
            progress,
            reference_group=reference_group,
            tolerance=tolerance,
            min_count=min_count,
            provisional=provisional,
        )
    published = result.published
    total_n = sum(c.n for v in versions for c in v.cells.values())
    total_obs = sum(c.observed for v in versions for c in v.cells.values())
    row = AuditSnapshot(
        policy=policy,
        month=str(month),
        created_at=now,
        created_by=actor,
        time_zone=time_zone,
        code_version=__version__,
        versions=[v.version for v in versions],
        recommendations=total_n,
        outcomes=total_obs,
        digest=published.digest,
        content=published.content(),
        internal=result.internal.content(),
        internal_digest=result.internal.digest,
    )
    session.add(row)
    session.flush()
    progress(
        f"snapshot {row.id}: {total_n:,} recommendations, {total_obs:,} outcomes, "
        f"{published.maturity.state}, {len(published.alerts)} alert(s), "
        f"digest {published.digest[:16]}"
    )
    return AuditRun(row.id, result)


def month_history(
    session: Session, policy: str, month: Month, versions: set[int]
) -> dict[int, list[MonthCounts]]:
    """The counts of the earlier months (up to ``WINDOW - 1`` of them), oldest first, per
    version, from the internal view of the latest snapshot of each month. Months without a
    current-format snapshot are skipped: the charts continue over the months that were
    audited."""
    earlier = [str(m) for m in reversed(month.previous(WINDOW - 1))]
    rows = session.execute(
        select(AuditSnapshot.month, AuditSnapshot.internal)
        .where(AuditSnapshot.policy == policy, AuditSnapshot.month.in_(earlier))
        .order_by(AuditSnapshot.month, AuditSnapshot.created_at, AuditSnapshot.id)
    )
    latest: dict[str, dict[str, Any]] = {}
    for m, internal in rows:
        if internal is not None and internal.get("format") == SNAPSHOT_FORMAT:
            latest[m] = internal
    history: dict[int, list[MonthCounts]] = {}
    for m in sorted(latest):
        snapshot = Snapshot.model_validate(latest[m])
        mature = snapshot.maturity.state == "mature"
        for section in snapshot.versions:
            if section.version not in versions:
                continue
            cells: dict[str, CellCounts] = {}
            scores: dict[str, ScoreSums] = {}
            for g in section.groups:
                cells[g.group] = _cell_of(g.counts)
                if g.score_sums is not None:
                    scores[g.group] = _score_sums_of(g.score_sums)
            history.setdefault(section.version, []).append(
                MonthCounts(Month.parse(m), mature, cells, scores)
            )
    return history


def _cell_of(counts: dict[str, Any]) -> CellCounts:
    return CellCounts(
        **{name: int(counts[name]) for name in _CELL_FIELDS},
    )


_CELL_FIELDS = ("n", "actions", "observed", "positives", "tp", "fp", "finals", "overrides")


def _score_sums_of(row: ScoreSumsRow) -> ScoreSums:
    return ScoreSums(
        power=PowerSums(
            n=row.n,
            sum_y=row.sum_y,
            sum_p=row.sum_p,
            sum_p2=row.sum_p2,
            sum_p3=row.sum_p3,
            sum_p4=row.sum_p4,
            sum_yp=row.sum_yp,
        ),
        log_double=row.log_double,
        log_half=row.log_half,
        bin_counts=list(row.bin_counts),
        bin_positives=list(row.bin_positives),
        bin_score_sums=list(row.bin_score_sums),
    )
