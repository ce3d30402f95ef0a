"""Checking the tally batches of the log: each recounted from its records (unless they were
purged) and its stored rows, both against its digest (see :mod:`service.store.log_verify`)."""

from __future__ import annotations

from collections.abc import Callable
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from service.log import tallies
from service.store.audit_models import Tally, TallyBatch
from service.store.db import begin_read_only
from service.store.log_sources import TALLIED_KINDS
from service.store.tally_counts import tally_ranges
from service.store.verify_problems import Found, Problem


def check_tally_batches(
    factory: sessionmaker[Session],
    purged_through: dict[str, int],
    checked: Callable[[int], None],
) -> None:
    """Check every tally batch in order; ``checked(batch_id)`` after each one that passes.
    Batches whose records were all purged (up to ``purged_through``) are checked against
    their stored rows only."""
    previous: dict[str, int] = {}
    last_id = 0
    while True:
        with factory() as session:
            begin_read_only(session)
            batch = session.scalars(
                select(TallyBatch).where(TallyBatch.id > last_id).order_by(TallyBatch.id).limit(1)
            ).first()
            if batch is None:
                return
            if batch.id != last_id + 1:
                raise Found(Problem("tally_batch", batch.id, "the batch before it is missing"))
            try:
                zone = ZoneInfo(batch.time_zone)
                ranges = {
                    k: (int(batch.ranges[k][0]), int(batch.ranges[k][1])) for k in TALLIED_KINDS
                }
            except (KeyError, TypeError, ValueError, ZoneInfoNotFoundError):
                raise Found(
                    Problem("tally_batch", batch.id, "its time zone or ranges are malformed")
                ) from None
            for kind, (after, through) in ranges.items():
                if after != previous.get(kind, 0) or through < after:
                    raise Found(
                        Problem(
                            "tally_batch",
                            batch.id,
                            f"its {kind} range does not continue the previous batch's",
                        )
                    )
            purged = all(r[1] <= purged_through.get(k, 0) for k, r in ranges.items())
            recount, _ = (None, 0) if purged else tally_ranges(session, ranges, zone)
            if recount is not None and tallies.digest(recount) != bytes(batch.digest):
                raise Found(
                    Problem(
                        "tally_batch",
                        batch.id,
                        "its records no longer give its digest: a record it counted was changed",
                    )
                )
            stored: tallies.Tallies = {}
            for row in session.scalars(select(Tally).where(Tally.batch_id == batch.id)):
                try:
                    cell, vector = tallies.from_row(row)
                except (TypeError, ValueError):
                    raise Found(
                        Problem("tally_batch", batch.id, f"its row {row.position} is malformed")
                    ) from None
                tallies.add_vector(stored, cell, vector)
            if tallies.digest(stored) != bytes(batch.digest):
                raise Found(
                    Problem(
                        "tally_batch",
                        batch.id,
                        "its stored rows do not give its digest: they were edited",
                    )
                )
            batch_id = batch.id
            session.rollback()
        previous = {k: r[1] for k, r in ranges.items()}
        last_id = batch_id
        checked(batch_id)
