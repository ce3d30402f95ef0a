"""Counting one day of decisions for the warnings before outcomes arrive (database side)."""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta
from typing import Any

from sqlalchemy import case, func, literal_column, select
from sqlalchemy.orm import Session

from service.audit.early_warning import DayCounts, DayWarnings, day_warnings, text_seed
from service.audit.month import zone_of
from service.audit.realized import CellCounts
from service.audit.verdicts import DEFAULT_MIN_COUNT
from service.audit.version_settings import resolve_settings
from service.errors import NotFound, Unprocessable
from service.policy.document import PolicyDocument
from service.store.models import PolicyVersion, Recommendation


def parse_day(text: str, field: str = "day") -> date:
    try:
        day = date.fromisoformat(text)
    except ValueError:
        raise Unprocessable(f"day {text!r} is not a date YYYY-MM-DD", field=field) from None
    if not 1900 <= day.year <= 9998:
        raise Unprocessable(f"day {text!r}: the year must be between 1900 and 9998", field=field)
    return day


def day_bounds(day: date, time_zone: str) -> tuple[datetime, datetime]:
    zone = zone_of(time_zone)
    start = datetime.combine(day, time(0), tzinfo=zone)
    end = datetime.combine(day + timedelta(days=1), time(0), tzinfo=zone)
    return start.astimezone(UTC), end.astimezone(UTC)


def _bin(score: Any, edges: list[float]) -> Any:
    if not edges:
        return literal_column("0")
    return case(*[(score < e, i) for i, e in enumerate(edges)], else_=len(edges))


def run_day_warnings(
    session: Session,
    policy: str,
    day: date,
    time_zone: str = "UTC",
    min_count: int = DEFAULT_MIN_COUNT,
) -> DayWarnings:
    """The warnings of one day of ``policy`` (read only); the drift tests' draws are seeded from
    the policy's name and the day, so re-running a day gives the same result."""
    start, end = day_bounds(day, time_zone)
    if start > datetime.now(UTC):
        raise Unprocessable(f"{day} has not begun in {time_zone}", field="day", code="future_day")
    documents = {
        int(v): PolicyDocument.model_validate(doc)
        for v, doc in session.execute(
            select(PolicyVersion.version, PolicyVersion.document).where(
                PolicyVersion.name == policy
            )
        )
    }
    if not documents:
        raise NotFound(f"unknown policy {policy!r}", code="unknown_policy", field="policy")
    r = Recommendation.__table__.c
    in_day = (r.policy == policy, r.issued_at >= start, r.issued_at < end)
    versions = [
        int(v) for (v,) in session.execute(select(r.version).where(*in_day).group_by(r.version))
    ]
    days: list[DayCounts] = []
    for version in sorted(versions):
        doc = documents[version]
        edges = list(doc.targets.score_edges or []) if doc.targets is not None else []
        rows = session.execute(
            select(
                r.group,
                _bin(r.score, edges).label("bin"),
                func.count().label("rows"),
                func.count().filter(r.action.is_(True)).label("actions"),
            )
            .where(*in_day, r.version == version)
            .group_by(r.group, literal_column("bin"))
        )
        n: dict[str, int] = {}
        actions: dict[str, int] = {}
        bins: dict[str, list[int]] = {}
        for row in rows:
            g = str(row.group)
            n[g] = n.get(g, 0) + int(row.rows)
            actions[g] = actions.get(g, 0) + int(row.actions)
            bins.setdefault(g, [0] * (len(edges) + 1))[int(row.bin)] += int(row.rows)
        cells = {g: CellCounts(n=n[g], actions=actions[g]) for g in n}
        settings = resolve_settings(doc, cells, None, None)
        days.append(DayCounts(version, doc, settings, cells, bins if edges else {}))
    return day_warnings(days, min_count, seed=[text_seed(f"{policy}\n{day.isoformat()}")])
