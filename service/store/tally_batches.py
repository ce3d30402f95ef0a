"""Tally batches: the audit's counts of sealed records, written once, by day and cohort cell.

After sealing, the records sealed but not tallied yet (decisions, outcome records, final
decisions; per kind the ids after the last batch's, up to the last seal's) are tallied by
the day of their decision in the audit's time zone and stored as one batch: a row per cell
and the digest of them all. A batch is written when enough records wait
(:data:`MIN_RECORDS`), when the last batch is older than :data:`MAX_AGE`, or on demand (the
audit asks for one before counting a month). Batches take consecutive ids: of two tallying
at once, one writes and the other rolls back. The batch is itself a record of the log, sealed
by the next seal, and verification recounts it from the records.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from service.log import tallies
from service.store.audit_models import Seal, Tally, TallyBatch
from service.store.db import begin_read_only
from service.store.log_sources import TALLIED_KINDS
from service.store.models import utcnow
from service.store.tally_counts import tally_ranges

log = logging.getLogger("evenhand.tallies")

MIN_RECORDS = 50_000
MAX_AGE = timedelta(hours=1)
MAX_IDS_PER_KIND = 500_000
"""A batch covers at most this many ids of each kind (a long backlog takes several)."""

Progress = Callable[[str], None]


def _quiet(_message: str) -> None:
    return None


@dataclass(frozen=True)
class BatchSummary:
    id: int
    ranges: dict[str, list[int]]
    records: int
    cells: int


def _untallied(session: Session) -> tuple[int, datetime | None, dict[str, tuple[int, int]]]:
    """(next batch id, the last batch's time, per kind the sealed ids not tallied yet)."""
    last = session.scalars(select(TallyBatch).order_by(TallyBatch.id.desc()).limit(1)).first()
    seal = session.scalars(select(Seal).order_by(Seal.id.desc()).limit(1)).first()
    sealed = {} if seal is None else {k: int(r[1]) for k, r in seal.ranges.items()}
    done = {} if last is None else {k: int(r[1]) for k, r in last.ranges.items()}
    pending = {}
    for kind in TALLIED_KINDS:
        after = done.get(kind, 0)
        through = max(after, min(sealed.get(kind, 0), after + MAX_IDS_PER_KIND))
        pending[kind] = (after, through)
    if last is None:
        return 1, None, pending
    return last.id + 1, last.created_at, pending


def tally_pending(
    factory: sessionmaker[Session],
    time_zone: str,
    *,
    force: bool = False,
    now: datetime | None = None,
    progress: Progress = _quiet,
) -> BatchSummary | None:
    """Write one batch of the sealed records not tallied yet, if one is due (or ``force``);
    None when nothing waits, none is due, or another process wrote it first. Commits."""
    now = now or utcnow()
    with factory() as session:
        begin_read_only(session)
        batch_id, last_at, pending = _untallied(session)
        waiting = sum(through - after for after, through in pending.values())
        due = force or waiting >= MIN_RECORDS or last_at is None or now - last_at >= MAX_AGE
        if not waiting or not due:
            session.rollback()
            return None
        counted, read = tally_ranges(session, pending, ZoneInfo(time_zone), progress=progress)
        session.rollback()
        cells = [(cell, v) for cell, v in sorted(counted.items()) if any(v)]
        ranges = {kind: [after, through] for kind, (after, through) in pending.items()}
        try:
            session.add(
                TallyBatch(
                    id=batch_id,
                    created_at=now,
                    time_zone=time_zone,
                    ranges=ranges,
                    digest=tallies.digest(counted),
                )
            )
            session.flush()
            session.add_all(
                Tally(batch_id=batch_id, position=i, **tallies.as_row(cell, vector))
                for i, (cell, vector) in enumerate(cells)
            )
            session.commit()
        except IntegrityError:
            session.rollback()
            log.info("tally batch %d was written by another process first", batch_id)
            return None
    return BatchSummary(batch_id, ranges, read, len(cells))
