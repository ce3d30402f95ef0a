"""Keeping the log up to date: seal what is new, tally what is sealed, seal the tallies.

One function for the server's periodic task and the CLI's ``log seal``. The audit does not
need it: it counts what no tally batch covers yet straight from the records.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

from sqlalchemy.orm import Session, sessionmaker

from service.store.sealing import MAX_LEAVES_PER_SEAL, SealSummary, seal_all_pending
from service.store.signing import Signer
from service.store.tally_batches import BatchSummary, tally_pending

Progress = Callable[[str], None]


def _quiet(_message: str) -> None:
    return None


@dataclass
class Upkeep:
    seals: list[SealSummary] = field(default_factory=list)
    batches: list[BatchSummary] = field(default_factory=list)

    @property
    def sealed(self) -> int:
        return sum(s.leaf_count for s in self.seals)


def keep_log(
    factory: sessionmaker[Session],
    signer: Signer,
    time_zone: str,
    *,
    tally_now: bool = False,
    mirror: str | None = None,
    max_leaves: int = MAX_LEAVES_PER_SEAL,
    progress: Progress = _quiet,
) -> Upkeep:
    """Seal everything, tally the sealed records when a batch is due (every one of them with
    ``tally_now``), and seal the new batches."""
    done = Upkeep()
    done.seals += seal_all_pending(factory, signer, max_leaves=max_leaves, mirror=mirror)
    if done.seals:
        progress(f"sealed {done.sealed:,} records in {len(done.seals)} seal(s)")
    while True:
        batch = tally_pending(factory, time_zone, force=tally_now, progress=progress)
        if batch is None:
            break
        done.batches.append(batch)
        progress(f"tally batch {batch.id}: {batch.records:,} records in {batch.cells} cells")
    if done.batches:
        done.seals += seal_all_pending(factory, signer, max_leaves=max_leaves, mirror=mirror)
    return done
