"""Verifying the log in the database: every record, seal, signature, tree node and tally batch.

For each seal in order, the records of its id ranges are read (a page at a time, in short
read-only transactions), encoded and hashed afresh; their tree, continued from the previous
seal's recomputed frontier, must give the seal's size and root, and the head must carry a
valid signature by a trusted key. A record that does not match is named by comparing its leaf
hash with the 8-byte tags kept at sealing: changed, missing (deleted) or not sealed (inserted).
Every tree node the seal completed is recomputed. Tally batches are recounted from their
records and must give their digest, and so must their stored rows. Signed heads kept
elsewhere (the mirror file, or heads saved from the API) are compared with the database's, so
a log cut back or rewritten from some seal on is detected too.

After a retention purge (``service.store.retention``) the decisions, outcomes and final
decisions of the seals up to the *horizon* are gone; their leaf hashes were kept. The horizon
is the largest ``through_seal`` among the purge records that a seal covers (the last seal's
range of purges; a forged one there is an inserted record, found when its seal is checked; an
unsealed purge row is ignored, so it never lets verification skip anything). Up to the
horizon, those kinds' leaves are the kept hashes (a record found there was inserted); every
root, frontier, tree node and signature is still checked. Tally batches within the horizon
are checked against their stored rows only (their records are gone, so no recount).

Verification stops at the first problem and reports it; no content of the database makes it
raise (a record that cannot even be decoded is a problem like any other). Memory is bounded
by the size of one seal, not of the log.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.log.heads import TreeHead
from service.log.merkle import TreeBuilder
from service.store.audit_models import Seal, SigningKey
from service.store.db import begin_read_only
from service.store.log_sources import KIND_ORDER, SOURCES
from service.store.models import ApiKey, KeyAction, KeyEvent
from service.store.seal_checks import check_seal, read_horizon, seal_range
from service.store.sealing import head_of
from service.store.tally_batch_checks import check_tally_batches
from service.store.verify_problems import Found, Problem, Progress, quiet


@dataclass
class VerifyResult:
    seals_checked: int = 0
    records_checked: int = 0
    tally_batches_checked: int = 0
    purged_through_seal: int = 0
    """The horizon: the seals up to it hold kept leaf hashes instead of personal records."""
    purged_leaves: int = 0
    unsealed: dict[str, int] = field(default_factory=dict)
    head: dict[str, Any] | None = None
    problem: Problem | None = None

    @property
    def ok(self) -> bool:
        return self.problem is None

    @property
    def unsealed_records(self) -> int:
        return sum(self.unsealed.values())


def _keys(session: Session, trusted: Mapping[str, bytes], trust_database: bool) -> dict[str, bytes]:
    keys = dict(trusted)
    if trust_database:
        for key_id, raw in session.execute(select(SigningKey.key_id, SigningKey.public_key)):
            keys.setdefault(key_id, bytes(raw))
    return keys


def verify_log(
    factory: sessionmaker[Session],
    trusted_keys: Mapping[str, bytes],
    *,
    trust_database_keys: bool = False,
    heads: Iterable[Mapping[str, Any]] = (),
    progress: Progress = quiet,
) -> VerifyResult:
    """Verify the whole log; stop at the first problem. ``trusted_keys`` (key id -> raw public
    key) are the keys a head may be signed with; ``trust_database_keys`` adds the public keys
    the database lists (only sensible when nothing else is at hand: whoever can write the
    database can add a key). ``heads`` are signed heads kept elsewhere, each compared with the
    database's."""
    result = VerifyResult()
    try:
        _verify(factory, trusted_keys, trust_database_keys, list(heads), result, progress)
    except Found as found:
        result.problem = found.problem
    return result


def _verify(
    factory: sessionmaker[Session],
    trusted_keys: Mapping[str, bytes],
    trust_database_keys: bool,
    heads: list[Mapping[str, Any]],
    result: VerifyResult,
    progress: Progress,
) -> None:
    builder = TreeBuilder()
    through: dict[str, int] = {}
    last_id = 0
    mirrored = {_head_seal_id(h): h for h in heads}
    with factory() as session:
        begin_read_only(session)
        keys = _keys(session, trusted_keys, trust_database_keys)
        horizon = read_horizon(session)
        session.rollback()
    result.purged_through_seal = horizon.seal
    purged_through: dict[str, int] = {}
    while True:
        with factory() as session:
            begin_read_only(session)
            seal = session.scalars(
                select(Seal).where(Seal.id > last_id).order_by(Seal.id).limit(1)
            ).first()
            if seal is None:
                session.rollback()
                break
            if seal.id != last_id + 1:
                raise Found(Problem("seal", seal.id, f"seal {last_id + 1} before it is missing"))
            leaves = check_seal(session, seal, builder, through, keys, horizon)
            through = {kind: seal_range(seal, kind, through)[1] for kind in KIND_ORDER}
            if seal.id == horizon.seal:
                purged_through = dict(through)
            head = {"head": head_of(seal).payload(), "signature": bytes(seal.signature).hex()}
            seal_id = seal.id
            session.rollback()
        result.seals_checked += 1
        result.records_checked += sum(1 for leaf in leaves if leaf.id)
        result.purged_leaves += sum(1 for leaf in leaves if not leaf.id)
        result.head = head
        other = mirrored.pop(seal_id, None)
        if other is not None and dict(other) != result.head:
            raise Found(
                Problem(
                    "seal",
                    seal_id,
                    "differs from the signed head kept outside the database: the log was rewritten",
                )
            )
        last_id = seal_id
        progress(f"verified seal {seal_id}: {result.records_checked:,} records so far")
    if horizon.seal > last_id:
        raise Found(
            Problem(
                "purge",
                0,
                f"a sealed purge record names seal {horizon.seal}, after the last seal {last_id}",
            )
        )
    if mirrored:
        first = min(mirrored)
        raise Found(
            Problem(
                "seal",
                first,
                f"seal {first} is in the heads kept outside the database but not in the "
                "database: the log was cut back",
            )
        )
    with factory() as session:
        begin_read_only(session)
        for kind in KIND_ORDER:
            t = SOURCES[kind].table
            # Seals cover ids from 1 up: a row below that is in no range, so no seal read it.
            planted = session.scalar(select(func.min(t.c.id)).where(t.c.id < 1))
            if planted is not None:
                session.rollback()
                raise Found(
                    Problem(kind, int(planted), "has an id no seal can cover: it was inserted")
                )
            result.unsealed[kind] = int(
                session.scalar(
                    select(func.count()).select_from(t).where(t.c.id > through.get(kind, 0))
                )
                or 0
            )
        # A key is logged through its events: one without a creation event never entered the
        # log, yet it would authenticate.
        stray = session.scalar(
            select(func.min(ApiKey.id)).where(
                ~select(KeyEvent.id)
                .where(KeyEvent.key_id == ApiKey.id, KeyEvent.action == KeyAction.CREATE.value)
                .exists()
            )
        )
        session.rollback()
    if stray is not None:
        raise Found(
            Problem("api_key", int(stray), "has no creation event in the log: it was inserted")
        )

    def checked(batch_id: int) -> None:
        result.tally_batches_checked += 1
        progress(f"checked tally batch {batch_id}")

    check_tally_batches(factory, purged_through, checked)


def _head_seal_id(head: Mapping[str, Any]) -> int:
    try:
        return int(TreeHead.from_payload(dict(head["head"])).seal_id)
    except (KeyError, TypeError, ValueError):
        raise Found(Problem("seal", 0, "a head kept outside the database is malformed")) from None
