"""Sealing the decision log and verifying it.

A seal is a Merkle tree head (RFC 9162 section 2.1) over the leaf hashes of records that were
not sealed yet, in id order, chained to the previous seal by its hash. Records carry the id of
their seal, so a seal is a *set* of records, not an id range: in PostgreSQL ids are handed out
before commit, a transaction holding a lower id may commit after a seal has run, and that
record must go into the next seal rather than be skipped. Scoring requests never wait for the
sealer's lock; only sealers exclude each other (an advisory lock on PostgreSQL, the write lock
of ``BEGIN IMMEDIATE`` on SQLite).

:func:`verify_log` recomputes every record hash from the record's fields, every seal's root
and the chain, and stops at the first record or seal that does not match. It reads in pages,
each in its own read-only transaction (on SQLite a deferred one that takes no write lock), so
it neither holds millions of rows in memory nor blocks writers; sealed records never
legitimately change, so pages need no common snapshot.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Literal

from sqlalchemy import (
    BigInteger,
    ColumnElement,
    Table,
    any_,
    bindparam,
    func,
    select,
    text,
    update,
)
from sqlalchemy.dialects.postgresql import ARRAY
from sqlalchemy.orm import Session

from service.log.merkle import TreeBuilder
from service.policy.document import canonical_json
from service.store.db import begin_read_only
from service.store.models import Recommendation, Seal, utcnow
from service.store.records import format_timestamp, record_leaf_hash

# Key of the PostgreSQL advisory lock that only sealers take (an arbitrary 64-bit constant).
SEALER_LOCK_KEY = 0x45564E48_5345414C  # "EVNH" "SEAL"
MAX_RECORDS_PER_SEAL = 100_000
PAGE_SIZE = 5_000

_REC: Table = Recommendation.__table__  # type: ignore[assignment]
_RECORD_COLUMNS = [c for c in _REC.c if c.name not in ("request_fingerprint",)]


def seal_hash(
    *,
    created_at: datetime,
    record_count: int,
    first_record_id: int,
    last_record_id: int,
    root_hash: str,
    previous_seal_hash: str | None,
) -> str:
    """SHA-256 hex over the canonical JSON of everything a seal states."""
    payload = {
        "created_at": format_timestamp(created_at),
        "record_count": record_count,
        "first_record_id": first_record_id,
        "last_record_id": last_record_id,
        "root_hash": root_hash,
        "previous_seal_hash": previous_seal_hash,
    }
    return hashlib.sha256(canonical_json(payload)).hexdigest()


@dataclass(frozen=True)
class _SealView:
    """A seal's stored fields, detached from the session."""

    id: int
    created_at: datetime
    record_count: int
    first_record_id: int
    last_record_id: int
    root_hash: str
    previous_seal_hash: str | None
    seal_hash: str

    @classmethod
    def of(cls, seal: Seal) -> _SealView:
        return cls(
            seal.id,
            seal.created_at,
            seal.record_count,
            seal.first_record_id,
            seal.last_record_id,
            seal.root_hash,
            seal.previous_seal_hash,
            seal.seal_hash,
        )


def _seal_hash_of(seal: _SealView) -> str:
    return seal_hash(
        created_at=seal.created_at,
        record_count=seal.record_count,
        first_record_id=seal.first_record_id,
        last_record_id=seal.last_record_id,
        root_hash=seal.root_hash,
        previous_seal_hash=seal.previous_seal_hash,
    )


def _take_sealer_lock(session: Session) -> None:
    dialect = session.get_bind().dialect.name
    if dialect == "postgresql":
        # Released by the database at commit or rollback, also when the process dies.
        session.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": SEALER_LOCK_KEY})
    elif dialect == "sqlite":
        # The store's engine opens every transaction with BEGIN IMMEDIATE; a write makes sure
        # this session's transaction has begun and holds the database's single write lock.
        session.execute(text("UPDATE seals SET id = id WHERE 0"))
    else:
        raise RuntimeError(f"sealing is not supported on {dialect!r}")


def _pending(session: Session, limit: int) -> Iterator[tuple[int, str]]:
    stmt = (
        select(_REC.c.id, _REC.c.record_hash)
        .where(_REC.c.seal_id.is_(None))
        .order_by(_REC.c.id)
        .limit(limit)
    )
    for row in session.execute(stmt.execution_options(yield_per=PAGE_SIZE)):
        yield int(row[0]), str(row[1])


def seal_pending(session: Session, max_records: int = MAX_RECORDS_PER_SEAL) -> Seal | None:
    """Seal up to ``max_records`` unsealed records; None when there are none. Commits.

    Only one sealer at a time: the lock is held until the commit.
    """
    try:
        _take_sealer_lock(session)
        builder = TreeBuilder()
        ids: list[int] = []
        for record_id, leaf_hex in _pending(session, max_records):
            builder.add_leaf_hash(bytes.fromhex(leaf_hex))
            ids.append(record_id)
        if not ids:
            session.commit()  # nothing written; ends the transaction and frees the lock
            return None
        previous = session.execute(select(Seal).order_by(Seal.id.desc()).limit(1)).scalar()
        created_at = utcnow()
        values: dict[str, Any] = {
            "created_at": created_at,
            "record_count": len(ids),
            "first_record_id": ids[0],
            "last_record_id": ids[-1],
            "root_hash": builder.root().hex(),
            "previous_seal_hash": previous.seal_hash if previous is not None else None,
        }
        seal = Seal(**values, seal_hash=seal_hash(**values))
        session.add(seal)
        session.flush()
        # Mark exactly the records in the tree, by id: a late commit with an id inside the
        # range stays unsealed for the next seal.
        connection = session.connection()
        in_tree: ColumnElement[bool]
        if connection.dialect.name == "sqlite":
            # This transaction has held SQLite's single write lock since before it read the
            # pending records, so no record can have committed since: the unsealed records
            # of the id range are exactly those in the tree (one range update, no id list).
            in_tree = _REC.c.id.between(ids[0], ids[-1])
        else:
            # PostgreSQL: exactly these ids, as one array parameter (an IN list would be
            # capped by the protocol's 65,535 parameters).
            in_tree = _REC.c.id == any_(bindparam("seal_ids", ids, type_=ARRAY(BigInteger)))
        marked = connection.execute(
            update(_REC).where(in_tree, _REC.c.seal_id.is_(None)).values(seal_id=seal.id)
        ).rowcount
        if marked != len(ids):
            # Only a second sealer ignoring the lock could cause this: seal nothing.
            raise RuntimeError(
                f"sealing: {len(ids) - marked} records were sealed meanwhile by another "
                "process; nothing was sealed"
            )
        session.commit()
        return seal
    except BaseException:
        session.rollback()
        raise


def seal_all_pending(session: Session, max_records: int = MAX_RECORDS_PER_SEAL) -> list[Seal]:
    """Seal until nothing is pending (several seals when there are many records)."""
    seals: list[Seal] = []
    while (seal := seal_pending(session, max_records)) is not None:
        seals.append(seal)
    return seals


@dataclass(frozen=True)
class Problem:
    """The first thing that does not match."""

    kind: Literal["record", "seal"]
    id: int
    reason: str


@dataclass
class VerifyResult:
    seals_checked: int = 0
    records_checked: int = 0
    unsealed_records: int = 0
    head_seal_id: int | None = None
    head_seal_hash: str | None = None
    problem: Problem | None = None

    @property
    def ok(self) -> bool:
        return self.problem is None


def _record_pages(session: Session, seal_id: int | None) -> Iterator[Any]:
    """The records of one seal (or the unsealed ones), in id order, page by page."""
    after = -1
    where = _REC.c.seal_id.is_(None) if seal_id is None else _REC.c.seal_id == seal_id
    while True:
        begin_read_only(session)
        rows = session.execute(
            select(*_RECORD_COLUMNS)
            .where(where, _REC.c.id > after)
            .order_by(_REC.c.id)
            .limit(PAGE_SIZE)
        ).all()
        # End the read transaction between pages: no long-lived snapshot on either database.
        session.commit()
        if not rows:
            return
        yield from rows
        after = int(rows[-1].id)


def _check_record(row: Any) -> str | None:
    expected = record_leaf_hash(row._mapping)
    if row.record_hash != expected:
        return (
            f"record hash {row.record_hash} does not match its fields (recomputed {expected}): "
            "the record was edited"
        )
    return None


Progress = Callable[[int], None]


def _tick(result: VerifyResult, progress: Progress | None) -> None:
    result.records_checked += 1
    if progress is not None and result.records_checked % PAGE_SIZE == 0:
        progress(result.records_checked)


def _check_seal(
    session: Session,
    seal: _SealView,
    previous_hash: str | None,
    result: VerifyResult,
    progress: Progress | None,
) -> Problem | None:
    builder = TreeBuilder()
    first = last = None
    for row in _record_pages(session, seal.id):
        reason = _check_record(row)
        if reason is not None:
            return Problem("record", int(row.id), reason)
        builder.add_leaf_hash(bytes.fromhex(row.record_hash))
        first = int(row.id) if first is None else first
        last = int(row.id)
        _tick(result, progress)
    if seal.previous_seal_hash != previous_hash:
        return Problem(
            "seal",
            seal.id,
            f"previous_seal_hash {seal.previous_seal_hash} is not the hash of the seal before "
            f"it ({previous_hash}): a seal was removed, inserted or reordered",
        )
    if builder.count != seal.record_count:
        return Problem(
            "seal",
            seal.id,
            f"seal states {seal.record_count} records but {builder.count} carry its id: "
            "records were deleted or added",
        )
    if builder.root().hex() != seal.root_hash:
        return Problem(
            "seal",
            seal.id,
            f"Merkle root of its records {builder.root().hex()} differs from the stored root "
            f"{seal.root_hash}: records were changed, reordered or moved between seals",
        )
    if (first, last) != (seal.first_record_id, seal.last_record_id):
        return Problem(
            "seal",
            seal.id,
            f"first/last record id {first}/{last} differ from the stated "
            f"{seal.first_record_id}/{seal.last_record_id}",
        )
    if _seal_hash_of(seal) != seal.seal_hash:
        return Problem(
            "seal", seal.id, "seal_hash does not match the seal's fields: the seal was edited"
        )
    return None


def verify_log(
    session: Session,
    expected_seal_hash: str | None = None,
    progress: Progress | None = None,
) -> VerifyResult:
    """Recompute every record hash, every seal root and the chain; stop at the first mismatch.

    The chain shows every change *behind* its last seal. Cutting the log back to an earlier
    seal (deleting the newest seals and their records) leaves a shorter chain that is
    consistent in itself; pass ``expected_seal_hash``, a seal hash kept outside the database
    (see ``head_seal_hash``), to detect that too. ``progress`` is called with the number of
    records checked so far, every few thousand records.
    """
    result = VerifyResult()
    seen: set[str] = set()
    begin_read_only(session)
    seals = [_SealView.of(s) for s in session.execute(select(Seal).order_by(Seal.id)).scalars()]
    session.commit()
    previous_hash: str | None = None
    for seal in seals:
        problem = _check_seal(session, seal, previous_hash, result, progress)
        if problem is not None:
            result.problem = problem
            return result
        result.seals_checked += 1
        result.head_seal_id, result.head_seal_hash = seal.id, seal.seal_hash
        previous_hash = seal.seal_hash
        seen.add(seal.seal_hash)
    if expected_seal_hash is not None and expected_seal_hash not in seen:
        result.problem = Problem(
            "seal",
            0,
            f"no seal in the chain has the expected hash {expected_seal_hash}: the log was cut "
            "back or rewritten after that seal was taken",
        )
        return result
    # Foreign keys stop this on a normal database; raw edits with them off do not.
    begin_read_only(session)
    missing = session.execute(
        select(func.min(_REC.c.id)).where(
            _REC.c.seal_id.is_not(None), _REC.c.seal_id.not_in(select(Seal.id))
        )
    ).scalar()
    session.commit()
    if missing is not None:
        result.problem = Problem("record", int(missing), "names a seal that does not exist")
        return result
    for row in _record_pages(session, None):
        reason = _check_record(row)
        if reason is not None:
            result.problem = Problem("record", int(row.id), reason)
            return result
        result.unsealed_records += 1
        _tick(result, progress)
    return result
