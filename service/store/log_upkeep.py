"""Keeping the log up to date: seal what is new, tally what is sealed, seal the tallies.

One function for the server's periodic task and the CLI's ``log seal``. The audit does not
need it: it counts what no tally batch covers yet straight from the records.

On PostgreSQL one round runs at a time across every process on the database: a round holds
a session-level advisory lock (:data:`UPKEEP_LOCK_KEY`) on a connection of its own. Two
sealers racing would still be safe (seals and tally batches take consecutive ids; the loser
rolls back), but each would hash the same records, take ``LOCK TABLE ... IN SHARE MODE``
for its watermarks and append the same heads to the head mirror: with N API workers, N times
the sealing work for one seal. The periodic sealer of every worker therefore skips its round
when another process holds the lock (``wait=False``); the CLI and the job runner wait for it.
If a process dies, PostgreSQL releases the lock with its connection. SQLite needs no lock for
safety (one writer) and gets none: run one worker on SQLite (docs/scaling.md).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

from sqlalchemy import Engine
from sqlalchemy.orm import Session, sessionmaker

from service.store.sealing import MAX_LEAVES_PER_SEAL, SealSummary, seal_all_pending
from service.store.signing import Signer
from service.store.tally_batches import BatchSummary, tally_pending

Progress = Callable[[str], None]

UPKEEP_LOCK_KEY = 0x45564E48_5345414C  # "EVNH" "SEAL" (the switch lock is "EVNH" "SWCH")


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
    wait: bool = True,
) -> Upkeep:
    """Seal everything, tally the sealed records when a batch is due (every one of them with
    ``tally_now``), and seal the new batches. On PostgreSQL, while another process keeps the
    log: wait for it to finish, or with ``wait=False`` do nothing (an empty :class:`Upkeep`)."""
    with upkeep_lock(factory, wait=wait) as mine:
        if not mine:
            return Upkeep()
        return _keep_log(factory, signer, time_zone, tally_now, mirror, max_leaves, progress)


@contextmanager
def upkeep_lock(factory: sessionmaker[Session], *, wait: bool) -> Iterator[bool]:
    """Hold the upkeep lock (PostgreSQL) for the block; yields whether it is held (always
    True elsewhere). The lock lives on a connection of its own, outside the round's
    transactions, and is released at the end, or by the server if the connection is lost."""
    bind = factory.kw.get("bind")
    if not isinstance(bind, Engine) or bind.dialect.name != "postgresql":
        yield True
        return
    with bind.connect() as conn:
        take = "pg_advisory_lock" if wait else "pg_try_advisory_lock"
        held = conn.exec_driver_sql(f"SELECT {take}({UPKEEP_LOCK_KEY})").scalar() is not False
        conn.commit()  # a session-level lock outlives the transaction; no transaction stays open
        try:
            yield held
        finally:
            if held:
                try:
                    conn.exec_driver_sql(f"SELECT pg_advisory_unlock({UPKEEP_LOCK_KEY})")
                    conn.commit()
                except Exception:
                    conn.invalidate()  # closing the connection releases the lock
                    raise


def _keep_log(
    factory: sessionmaker[Session],
    signer: Signer,
    time_zone: str,
    tally_now: bool,
    mirror: str | None,
    max_leaves: int,
    progress: Progress,
) -> Upkeep:
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
