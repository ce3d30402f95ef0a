"""Counting one policy's month: the only part of the audit that reads the database.

The month is the sum of the tally rows (``service.store.tally_batches``) of its days, from the
batches tallied in the audit's time zone, plus a count of the records no such batch covers
yet: those after the last batch, and those of batches tallied in another zone (whose days do
not line up with this month's). Both parts are exact integer tallies, so the result is the
same however the records happen to be split between them.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.log import tallies
from service.store.audit_models import Tally, TallyBatch
from service.store.log_sources import SOURCES, TALLIED_KINDS, max_id
from service.store.tally_counts import tally_ranges

Progress = Callable[[str], None]


def quiet(_message: str) -> None:
    return None


def _uncovered(session: Session, time_zone: str) -> list[dict[str, tuple[int, int]]]:
    """Id ranges of the records the batches of ``time_zone`` do not cover."""
    ranges: list[dict[str, tuple[int, int]]] = []
    for (batch_ranges,) in session.execute(
        select(TallyBatch.ranges).where(TallyBatch.time_zone != time_zone).order_by(TallyBatch.id)
    ):
        ranges.append({k: (int(v[0]), int(v[1])) for k, v in batch_ranges.items()})
    last = session.scalar(select(TallyBatch.ranges).order_by(TallyBatch.id.desc()).limit(1))
    done = {} if last is None else {k: int(v[1]) for k, v in last.items()}
    # The tail ends at each table's largest id (one read of the primary key's last entry): a
    # bound far above it (an "open" end) made PostgreSQL, without fresh statistics, estimate
    # the whole table in range and scan it instead of the few ids after the last batch.
    ranges.append({k: (done.get(k, 0), max_id(session, SOURCES[k])) for k in TALLIED_KINDS})
    return ranges


def count_month(
    session: Session,
    policy: str,
    start: datetime,
    end: datetime,
    time_zone: str,
    progress: Progress = quiet,
) -> tallies.Tallies:
    """The tallies of the decisions of ``policy`` issued in ``[start, end)`` (local midnights
    in ``time_zone``), with their outcomes and final decisions, by cell."""
    zone = ZoneInfo(time_zone)
    first_day = start.astimezone(zone).date()
    last_day = (end - timedelta(microseconds=1)).astimezone(zone).date()
    month: tallies.Tallies = {}
    rows = 0
    for row in session.execute(
        select(
            Tally.policy, Tally.version, Tally.group, Tally.shadow_version, Tally.day, Tally.vector
        )
        .join(TallyBatch, TallyBatch.id == Tally.batch_id)
        .where(
            Tally.policy == policy,
            Tally.day >= first_day,
            Tally.day <= last_day,
            TallyBatch.time_zone == time_zone,
        )
    ):
        tallies.add_vector(month, *tallies.from_row(row))
        rows += 1
    progress(f"  summed {rows:,} tally rows")
    for ranges in _uncovered(session, time_zone):
        extra, read = tally_ranges(session, ranges, zone, window=(policy, start, end))
        for cell, vector in extra.items():
            tallies.add_vector(month, cell, vector)
        if read:
            progress(f"  counted {read:,} records not tallied yet")
    return month
