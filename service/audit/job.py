"""The audit job: count one policy's month in the database, finish the maths, store a snapshot.

Cohort: recommendations of the policy issued in the calendar month, with the month cut in the
deployment's time zone (``EVENHAND_TIMEZONE``, default UTC). Every count is a GROUP BY in the
database, per (version, group, shadow version); the month is counted in day-sized slices so the
job can show progress, and only the grouped totals (a few rows per slice) ever reach Python.
Python then adds up the slices (integer sums, exact), computes intervals and statuses, and
writes the snapshot. Snapshots are immutable; a re-run writes a new one.
"""

from __future__ import annotations

import re
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from sqlalchemy import Float, and_, case, cast, func, select
from sqlalchemy.orm import Session

from service import __version__
from service.audit.snapshot import AuditInput, VersionCounts, build_snapshot
from service.errors import NotFound, Unprocessable
from service.policy.document import PolicyDocument
from service.policy.realized import CellCounts, ShadowCounts
from service.policy.statuses import DEFAULT_MIN_COUNT
from service.store.audit_models import AuditSnapshot, FinalDecision, Outcome
from service.store.models import PolicyVersion, Recommendation

MONTH_PATTERN = re.compile(r"^(\d{4})-(0[1-9]|1[0-2])$")

Progress = Callable[[str], None]


def stderr_progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def _quiet(_message: str) -> None:
    return None


def parse_month(month: str) -> tuple[int, int]:
    m = MONTH_PATTERN.match(month)
    if m is None:
        raise Unprocessable(f"month {month!r} is not of the form YYYY-MM", field="month")
    return int(m.group(1)), int(m.group(2))


def month_bounds(month: str, time_zone: str) -> tuple[datetime, datetime]:
    """[start, end) of the calendar month in ``time_zone``, as UTC instants."""
    year, mon = parse_month(month)
    try:
        zone = ZoneInfo(time_zone)
    except (ZoneInfoNotFoundError, ValueError):
        raise Unprocessable(f"unknown time zone {time_zone!r}", field="timezone") from None
    start = datetime(year, mon, 1, tzinfo=zone)
    end = datetime(year + (mon == 12), mon % 12 + 1, 1, tzinfo=zone)
    return start.astimezone(UTC), end.astimezone(UTC)


def previous_months(month: str, count: int) -> list[str]:
    year, mon = parse_month(month)
    out = []
    for _ in range(count):
        year, mon = (year - 1, 12) if mon == 1 else (year, mon - 1)
        out.append(f"{year:04d}-{mon:02d}")
    return out


_CELL_FIELDS = (
    "n",
    "actions",
    "observed",
    "positives",
    "tp",
    "fp",
    "finals",
    "overrides",
    "shadow_actions",
    "differs",
    "shadow_tp",
    "shadow_fp",
)
_FLOAT_FIELDS = ("expected_actions", "expected_fp", "expected_fn")


def _count_statement(policy: str, start: datetime, end: datetime) -> Any:
    r = Recommendation.__table__.c
    o = Outcome.__table__.c
    f = FinalDecision.__table__.c
    y = o.outcome
    acted = r.action.is_(True)
    shadow_acted = r.shadow_action.is_(True)

    def count_if(condition: Any) -> Any:
        return func.sum(case((condition, 1), else_=0))

    def float_sum(value: Any, condition: Any) -> Any:
        return func.sum(case((condition, cast(value, Float)), else_=0.0))

    # Rows whose shadow version could not decide count as rows without a shadow.
    shadow_key = case((r.shadow_action.is_(None), None), else_=r.shadow_version)
    return (
        select(
            r.version,
            r.group,
            shadow_key.label("shadow_version"),
            func.count().label("n"),
            count_if(acted).label("actions"),
            func.count(y).label("observed"),
            count_if(y == 1).label("positives"),
            count_if(and_(acted, y == 1)).label("tp"),
            count_if(and_(acted, y == 0)).label("fp"),
            func.count(f.recommendation_pk).label("finals"),
            count_if(f.overridden.is_(True)).label("overrides"),
            count_if(shadow_acted).label("shadow_actions"),
            count_if(r.shadow_action != r.action).label("differs"),
            count_if(and_(shadow_acted, y == 1)).label("shadow_tp"),
            count_if(and_(shadow_acted, y == 0)).label("shadow_fp"),
            func.sum(cast(r.probability, Float)).label("expected_actions"),
            float_sum(r.probability, y == 0).label("expected_fp"),
            float_sum(1.0 - r.probability, y == 1).label("expected_fn"),
        )
        .select_from(
            Recommendation.__table__.outerjoin(
                Outcome.__table__, o.recommendation_pk == r.id
            ).outerjoin(FinalDecision.__table__, f.recommendation_pk == r.id)
        )
        .where(r.policy == policy, r.issued_at >= start, r.issued_at < end)
        .group_by(r.version, r.group, shadow_key)
    )


@dataclass
class _Tally:
    ints: dict[str, int] = field(default_factory=lambda: dict.fromkeys(_CELL_FIELDS, 0))
    floats: dict[str, float] = field(default_factory=lambda: dict.fromkeys(_FLOAT_FIELDS, 0.0))

    def add(self, row: Any) -> None:
        for name in _CELL_FIELDS:
            self.ints[name] += int(getattr(row, name) or 0)
        for name in _FLOAT_FIELDS:
            self.floats[name] += float(getattr(row, name) or 0.0)


Key = tuple[int, str, int | None]


def count_month(
    session: Session,
    policy: str,
    start: datetime,
    end: datetime,
    progress: Progress = _quiet,
    slice_length: timedelta = timedelta(days=1),
) -> dict[Key, _Tally]:
    """Grouped counts of the cohort, summed over time slices of ``slice_length``."""
    tallies: dict[Key, _Tally] = {}
    slices = max(1, -(-(end - start) // slice_length))
    rows_seen = 0
    lo = start
    for i in range(slices):
        hi = min(end, lo + slice_length)
        for row in session.execute(_count_statement(policy, lo, hi)):
            key = (int(row.version), str(row.group), row.shadow_version)
            tallies.setdefault(key, _Tally()).add(row)
            rows_seen += int(row.n)
        progress(f"  counted {lo:%Y-%m-%d %H:%M}Z slice {i + 1}/{slices}: {rows_seen:,} so far")
        lo = hi
    return tallies


def cells_from_tallies(
    tallies: dict[Key, _Tally],
) -> dict[int, tuple[dict[str, CellCounts], dict[int, dict[str, ShadowCounts]]]]:
    """Per version: the cell of each group (all shadow subgroups added up) and shadow cells."""
    merged: dict[tuple[int, str], _Tally] = {}
    shadows: dict[int, dict[int, dict[str, ShadowCounts]]] = {}
    for (version, group, shadow_version), t in tallies.items():
        m = merged.setdefault((version, group), _Tally())
        for name in _CELL_FIELDS:
            m.ints[name] += t.ints[name]
        for name in _FLOAT_FIELDS:
            m.floats[name] += t.floats[name]
        if shadow_version is not None:
            shadows.setdefault(version, {}).setdefault(int(shadow_version), {})[group] = (
                ShadowCounts(
                    n=t.ints["n"],
                    actions=t.ints["shadow_actions"],
                    differs=t.ints["differs"],
                    observed=t.ints["observed"],
                    positives=t.ints["positives"],
                    tp=t.ints["shadow_tp"],
                    fp=t.ints["shadow_fp"],
                )
            )
    out: dict[int, tuple[dict[str, CellCounts], dict[int, dict[str, ShadowCounts]]]] = {}
    for (version, group), t in sorted(merged.items()):
        cell = CellCounts(
            n=t.ints["n"],
            actions=t.ints["actions"],
            observed=t.ints["observed"],
            positives=t.ints["positives"],
            tp=t.ints["tp"],
            fp=t.ints["fp"],
            finals=t.ints["finals"],
            overrides=t.ints["overrides"],
            expected_actions=t.floats["expected_actions"],
            expected_fp=t.floats["expected_fp"],
            expected_fn=t.floats["expected_fn"],
        )
        out.setdefault(version, ({}, shadows.get(version, {})))[0][group] = cell
    return out


@dataclass(frozen=True)
class AuditRun:
    snapshot_id: int
    snapshot: dict[str, Any]
    cells: dict[int, dict[str, CellCounts]]
    """The true counts the statuses were decided on (not stored: they are not suppressed)."""


def _load_documents(session: Session, policy: str, versions: set[int]) -> dict[int, Any]:
    rows = session.execute(
        select(PolicyVersion.version, PolicyVersion.document, PolicyVersion.content_hash).where(
            PolicyVersion.name == policy, PolicyVersion.version.in_(sorted(versions))
        )
    )
    return {int(v): (PolicyDocument.model_validate(doc), h) for v, doc, h in rows}


def latest_snapshots(session: Session, policy: str, months: list[str]) -> list[dict[str, Any]]:
    """The latest snapshot content of each of ``months`` that has one."""
    if not months:
        return []
    rows = session.execute(
        select(AuditSnapshot.month, AuditSnapshot.content)
        .where(AuditSnapshot.policy == policy, AuditSnapshot.month.in_(months))
        .order_by(AuditSnapshot.month, AuditSnapshot.created_at, AuditSnapshot.id)
    )
    latest: dict[str, dict[str, Any]] = {}
    for month, content in rows:
        latest[month] = content
    return [latest[m] for m in sorted(latest)]


def run_audit(
    session: Session,
    policy: str,
    month: str,
    *,
    time_zone: str = "UTC",
    actor: str = "cli",
    reference_group: str | None = None,
    min_count: int = DEFAULT_MIN_COUNT,
    progress: Progress = _quiet,
    now: datetime | None = None,
) -> AuditRun:
    """Audit ``policy`` for ``month`` and store the snapshot (the caller commits)."""
    start, end = month_bounds(month, time_zone)
    known = session.scalar(select(func.count()).where(PolicyVersion.name == policy))
    if not known:
        raise NotFound(f"unknown policy {policy!r}", code="unknown_policy", field="policy")
    span = f"{start:%Y-%m-%d %H:%M}Z to {end:%Y-%m-%d %H:%M}Z"
    progress(f"auditing {policy} for {month} ({time_zone}): {span}")
    tallies = count_month(session, policy, start, end, progress)
    per_version = cells_from_tallies(tallies)
    docs = _load_documents(session, policy, set(per_version))
    versions = [
        VersionCounts(v, docs[v][0], cells, shadows)
        for v, (cells, shadows) in sorted(per_version.items())
    ]
    history = latest_snapshots(session, policy, previous_months(month, 11))
    created = now or datetime.now(UTC)
    snapshot = build_snapshot(
        AuditInput(
            policy=policy,
            month=month,
            time_zone=time_zone,
            cohort_from=start,
            cohort_until=end,
            created_at=created,
            code_version=__version__,
            versions=versions,
            reference_group=reference_group,
            min_count=min_count,
            history=history,
        ),
        content_hashes={v: docs[v][1] for v in docs},
    )
    total_n = sum(c.n for v in versions for c in v.cells.values())
    total_obs = sum(c.observed for v in versions for c in v.cells.values())
    row = AuditSnapshot(
        policy=policy,
        month=month,
        created_at=created,
        created_by=actor,
        time_zone=time_zone,
        code_version=__version__,
        versions=[v.version for v in versions],
        recommendations=total_n,
        outcomes=total_obs,
        digest=snapshot["digest"],
        content=snapshot,
    )
    session.add(row)
    session.flush()
    progress(
        f"snapshot {row.id}: {total_n:,} recommendations, {total_obs:,} outcomes, "
        f"{len(snapshot['alerts'])} alert(s), digest {snapshot['digest'][:16]}"
    )
    return AuditRun(row.id, snapshot, {v.version: dict(v.cells) for v in versions})
