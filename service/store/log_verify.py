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

import hashlib
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.log import tallies
from service.log.audit_records import SNAPSHOT
from service.log.heads import TreeHead, verify_head
from service.log.merkle import TreeBuilder, leaf_hash
from service.log.records import canonical
from service.store.audit_models import (
    LogPurge,
    PurgedLeaves,
    Seal,
    SigningKey,
    Tally,
    TallyBatch,
    TreeNode,
)
from service.store.db import begin_read_only
from service.store.log_sources import KIND_ORDER, PURGED_KINDS, SOURCES, TALLIED_KINDS, rows
from service.store.models import ApiKey, KeyAction, KeyEvent
from service.store.sealing import (
    BLOCK,
    BLOCK_LEVEL,
    TAG_BYTES,
    BlockTracker,
    LastSeal,
    head_of,
    pack_frontier,
)
from service.store.tally_counts import tally_ranges

Progress = Callable[[str], None]


def _quiet(_message: str) -> None:
    return None


@dataclass(frozen=True)
class Problem:
    """The first thing that does not match: a record of some kind, a seal, a tree node, a
    tally batch or a mirrored head; ``id`` is its row id (0 when there is none)."""

    kind: str
    id: int
    reason: str


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


class _Found(Exception):
    def __init__(self, problem: Problem) -> None:
        self.problem = problem


@dataclass(frozen=True)
class _Leaf:
    kind: str
    id: int
    """The record's row id (0 for a purged record's kept hash)."""
    hash: bytes


@dataclass(frozen=True)
class _Horizon:
    seal: int = 0
    """The largest through_seal of the sealed purge records (0: nothing purged)."""
    purge: int = 0
    """The purge record that names it."""
    unsealed_seal: int = 0
    """The same among purge rows no seal covers yet (only to explain a failure)."""
    unsealed_purge: int = 0


def _snapshot_problem(row: Any) -> str | None:
    for column, digest_column in (("content", "digest"), ("internal", "internal_digest")):
        content = getattr(row, column)
        if column == "internal" and content is None and row.internal_digest is None:
            continue  # written before the internal view existed
        if not isinstance(content, Mapping):
            return f"its {column} view is not a JSON object"
        body = {k: v for k, v in content.items() if k != "digest"}
        try:
            recomputed = hashlib.sha256(canonical(body)).hexdigest()
        except (TypeError, ValueError) as exc:
            return f"its {column} view cannot be encoded: {exc}"
        stored = getattr(row, digest_column)
        if content.get("digest") != stored or recomputed != stored:
            return f"its {column} view no longer gives its digest {str(stored)[:16]}..."
    return None


def _kept_leaves(
    session: Session, seal: Seal, kind: str, span: tuple[int, int, int], purge_id: int
) -> list[_Leaf]:
    """The kept leaf hashes of a purged seal's records of ``kind`` (none of which may remain)."""
    after, through, count = span
    t = SOURCES[kind].table
    left = session.scalar(select(func.min(t.c.id)).where(t.c.id > after, t.c.id <= through))
    blob = session.scalar(
        select(PurgedLeaves.hashes).where(
            PurgedLeaves.seal_id == seal.id, PurgedLeaves.kind == kind
        )
    )
    if left is not None and blob is None:
        raise _Found(
            Problem(
                "purge",
                purge_id,
                f"says the records of seal {seal.id} were purged, but its {kind} records are "
                "there and no hashes of them were kept: the purge record was forged or edited",
            )
        )
    if left is not None:
        raise _Found(
            Problem(
                kind,
                int(left),
                f"is in the range of seal {seal.id}, whose {kind} records were purged: it was "
                "inserted",
            )
        )
    if count == 0:
        return []
    data = bytes(blob or b"")
    if len(data) != 32 * count:
        raise _Found(
            Problem(
                "seal",
                seal.id,
                f"the leaf hashes kept for its {count} purged {kind} records are missing or "
                "incomplete",
            )
        )
    return [_Leaf(kind, 0, data[i : i + 32]) for i in range(0, len(data), 32)]


def _leaves(
    session: Session, seal: Seal, prev_through: dict[str, int], horizon: _Horizon
) -> list[_Leaf]:
    leaves: list[_Leaf] = []
    for kind in KIND_ORDER:
        after, through, count = _range(seal, kind, prev_through)
        if seal.id <= horizon.seal and kind in PURGED_KINDS:
            leaves += _kept_leaves(session, seal, kind, (after, through, count), horizon.purge)
            continue
        source = SOURCES[kind]
        try:
            for row in rows(session, source, after, through):
                try:
                    data = source.encode(row)
                except Exception as exc:  # any stored value: report, never raise
                    raise _Found(
                        Problem(kind, int(row.id), f"cannot be read as a {kind} record: {exc}")
                    ) from None
                if kind == SNAPSHOT and (reason := _snapshot_problem(row)) is not None:
                    raise _Found(Problem(kind, int(row.id), reason))
                leaves.append(_Leaf(kind, int(row.id), leaf_hash(data)))
        except _Found:
            raise
        except Exception as exc:  # the driver could not even decode a row of the page
            session.rollback()
            begin_read_only(session)
            raise _Found(_unreadable(session, kind, after, through, exc)) from None
    return leaves


def _unreadable(session: Session, kind: str, after: int, through: int, error: Exception) -> Problem:
    """The first record of ``(after, through]`` that cannot be read back, one at a time."""
    source = SOURCES[kind]
    t = source.table
    ids = session.scalars(
        select(t.c.id).where(t.c.id > after, t.c.id <= through).order_by(t.c.id)
    ).all()
    for record_id in ids:
        try:
            session.execute(source.page(int(record_id) - 1, int(record_id), 1)).all()
        except Exception as exc:
            session.rollback()
            return Problem(kind, int(record_id), f"cannot be read as a {kind} record: {exc}")
    return Problem(kind, 0, f"a {kind} record after id {after} cannot be read: {error}")


def _range(seal: Seal, kind: str, prev_through: dict[str, int]) -> tuple[int, int, int]:
    ranges = seal.ranges if isinstance(seal.ranges, Mapping) else {}
    value = ranges.get(kind, [prev_through.get(kind, 0), prev_through.get(kind, 0), 0])
    try:
        after, through, count = (int(x) for x in value)
    except (TypeError, ValueError):
        raise _Found(
            Problem("seal", seal.id, f"its range of {kind} records is malformed")
        ) from None
    if after != prev_through.get(kind, 0) or through < after or count < 0:
        raise _Found(
            Problem(
                "seal",
                seal.id,
                f"its {kind} range ({after}, {through}] does not continue the previous seal's "
                f"(which ended at {prev_through.get(kind, 0)}): a seal was removed or edited",
            )
        )
    return after, through, count


def _expected_tags(session: Session, seal: Seal, start: int, end: int) -> list[bytes | None]:
    """The stored 8-byte tag of each leaf position in ``[start, end)`` (None where missing):
    a completed block's from its tree node, the last block's from the seal's own tags."""
    tags: list[bytes | None] = []
    if end <= start:
        return tags
    for block in range(start // BLOCK, (end - 1) // BLOCK + 1):
        lo = block * BLOCK
        first = max(lo, start)
        if lo + BLOCK <= end:
            blob = session.scalar(
                select(TreeNode.tags).where(
                    TreeNode.level == BLOCK_LEVEL, TreeNode.position == block
                )
            )
            offset = lo
        else:
            blob, offset = seal.tags, first
        data = bytes(blob or b"")
        for p in range(first, min(lo + BLOCK, end)):
            k = (p - offset) * TAG_BYTES
            tag = data[k : k + TAG_BYTES]
            tags.append(tag if len(tag) == TAG_BYTES else None)
    return tags


def _name_bad_leaf(leaves: list[_Leaf], expected: list[bytes | None], seal: Seal) -> Problem:
    """The first record that differs from what was sealed, by the stored tags."""
    for i, leaf in enumerate(leaves):
        tag = leaf.hash[:TAG_BYTES]
        if i < len(expected) and expected[i] == tag:
            continue
        if i + 1 < len(expected) and expected[i + 1] == tag:
            return Problem(
                leaf.kind,
                leaf.id,
                f"the record sealed just before this one (seal {seal.id}, leaf "
                f"{int(seal.tree_size) - int(seal.leaf_count) + i}) is missing: it was deleted",
            )
        if (
            i + 1 < len(leaves)
            and i < len(expected)
            and leaves[i + 1].hash[:TAG_BYTES] == expected[i]
        ):
            return Problem(leaf.kind, leaf.id, f"was not in seal {seal.id}: it was inserted")
        return Problem(
            leaf.kind, leaf.id, f"differs from the record sealed in seal {seal.id}: it was changed"
        )
    if len(leaves) < len(expected):
        last = leaves[-1] if leaves else None
        where = f"after {last.kind} #{last.id}" if last else "at its start"
        return Problem(
            "seal",
            seal.id,
            f"{len(expected) - len(leaves)} record(s) sealed {where} are missing: deleted",
        )
    return Problem(
        "seal",
        seal.id,
        "its records do not give its root, though each matches its tag: the records were "
        "reordered, or the seal or its tags were edited",
    )


def _check_nodes(session: Session, blocks: BlockTracker, seal: Seal) -> None:
    """The tree nodes and tags the seal should have written, as the sealer computes them."""
    for node in blocks.nodes:
        stored = session.get(TreeNode, (node.level, node.position))
        where = f"tree node ({node.level}, {node.position}) of seal {seal.id}"
        if stored is None:
            raise _Found(Problem("tree_node", 0, f"{where} is missing"))
        if bytes(stored.hash) != node.hash or (
            node.tags is not None and bytes(stored.tags or b"") != node.tags
        ):
            raise _Found(Problem("tree_node", 0, f"{where} does not match its leaves"))
    if bytes(seal.tags) != blocks.own_tags(int(seal.tree_size)):
        raise _Found(Problem("seal", seal.id, "its stored leaf tags do not match its leaves"))


def _check_seal(
    session: Session,
    seal: Seal,
    builder: TreeBuilder,
    prev_through: dict[str, int],
    keys: dict[str, bytes],
    horizon: _Horizon,
) -> list[_Leaf]:
    start = builder.count
    leaves = _leaves(session, seal, prev_through, horizon)
    try:
        blocks = BlockTracker(
            LastSeal(seal.id - 1, start, builder.frontier(), prev_through), session
        )
    except RuntimeError as exc:
        raise _Found(Problem("seal", seal.id - 1, str(exc))) from None
    for leaf in leaves:
        builder.add_leaf_hash(leaf.hash)
        try:
            blocks.add(builder.count, leaf.hash)
        except RuntimeError as exc:
            raise _Found(Problem("tree_node", 0, str(exc))) from None
    counts = {kind: _range(seal, kind, prev_through)[2] for kind in KIND_ORDER}
    found = {kind: sum(1 for leaf in leaves if leaf.kind == kind) for kind in KIND_ORDER}
    size_ok = builder.count == int(seal.tree_size) and counts == found
    if not size_ok or builder.root() != bytes(seal.root):
        end = start + sum(counts.values())
        bad = _name_bad_leaf(leaves, _expected_tags(session, seal, start, end), seal)
        gone = [k for k in KIND_ORDER if counts[k] and not found[k]]
        if gone:  # a whole kind missing: say so rather than name a neighbour as changed
            bad = Problem(
                "seal",
                seal.id,
                f"all {counts[gone[0]]} of its {gone[0]} records are missing: deleted",
            )
        if seal.id <= horizon.unsealed_seal:
            bad = Problem(
                bad.kind,
                bad.id,
                f"{bad.reason} (purge #{horizon.unsealed_purge} deleted records up to seal "
                f"{horizon.unsealed_seal} but is not sealed yet: run `evenhand log seal`)",
            )
        raise _Found(bad)
    if bytes(seal.frontier) != pack_frontier(builder.frontier()):
        raise _Found(Problem("seal", seal.id, "its stored frontier does not match its leaves"))
    problem = verify_head(head_of(seal), bytes(seal.signature), keys)
    if problem is not None:
        raise _Found(Problem("seal", seal.id, problem))
    _check_nodes(session, blocks, seal)
    return leaves


def _horizon(session: Session) -> _Horizon:
    last = session.scalars(select(Seal).order_by(Seal.id.desc()).limit(1)).first()
    sealed = 0
    if last is not None and isinstance(last.ranges, Mapping):
        try:
            sealed = int(last.ranges.get("purge", [0, 0, 0])[1])
        except (TypeError, ValueError, IndexError):
            sealed = 0  # the seal's own check reports the malformed range
    best = (0, 0)
    unsealed = (0, 0)
    for purge_id, through_seal in session.execute(select(LogPurge.id, LogPurge.through_seal)):
        try:
            value = int(through_seal)
        except (TypeError, ValueError):
            continue  # an unreadable purge record is reported when its seal is checked
        if purge_id <= sealed and value > best[0]:
            best = (value, int(purge_id))
        elif purge_id > sealed and value > unsealed[0]:
            unsealed = (value, int(purge_id))
    return _Horizon(best[0], best[1], unsealed[0], unsealed[1])


def _keys(session: Session, trusted: Mapping[str, bytes], trust_database: bool) -> dict[str, bytes]:
    keys = dict(trusted)
    if trust_database:
        for key_id, raw in session.execute(select(SigningKey.key_id, SigningKey.public_key)):
            keys.setdefault(key_id, bytes(raw))
    return keys


def _check_tally_batches(
    factory: sessionmaker[Session],
    purged_through: dict[str, int],
    result: VerifyResult,
    progress: Progress,
) -> None:
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
                raise _Found(Problem("tally_batch", batch.id, "the batch before it is missing"))
            try:
                zone = ZoneInfo(batch.time_zone)
                ranges = {
                    k: (int(batch.ranges[k][0]), int(batch.ranges[k][1])) for k in TALLIED_KINDS
                }
            except (KeyError, TypeError, ValueError, ZoneInfoNotFoundError):
                raise _Found(
                    Problem("tally_batch", batch.id, "its time zone or ranges are malformed")
                ) from None
            for kind, (after, through) in ranges.items():
                if after != previous.get(kind, 0) or through < after:
                    raise _Found(
                        Problem(
                            "tally_batch",
                            batch.id,
                            f"its {kind} range does not continue the previous batch's",
                        )
                    )
            purged = all(r[1] <= purged_through.get(k, 0) for k, r in ranges.items())
            recount, _ = (None, 0) if purged else tally_ranges(session, ranges, zone)
            if recount is not None and tallies.digest(recount) != bytes(batch.digest):
                raise _Found(
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
                    raise _Found(
                        Problem("tally_batch", batch.id, f"its row {row.position} is malformed")
                    ) from None
                tallies.add_vector(stored, cell, vector)
            if tallies.digest(stored) != bytes(batch.digest):
                raise _Found(
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
        result.tally_batches_checked += 1
        progress(f"checked tally batch {batch_id}")


def verify_log(
    factory: sessionmaker[Session],
    trusted_keys: Mapping[str, bytes],
    *,
    trust_database_keys: bool = False,
    heads: Iterable[Mapping[str, Any]] = (),
    progress: Progress = _quiet,
) -> VerifyResult:
    """Verify the whole log; stop at the first problem. ``trusted_keys`` (key id -> raw public
    key) are the keys a head may be signed with; ``trust_database_keys`` adds the public keys
    the database lists (only sensible when nothing else is at hand: whoever can write the
    database can add a key). ``heads`` are signed heads kept elsewhere, each compared with the
    database's."""
    result = VerifyResult()
    try:
        _verify(factory, trusted_keys, trust_database_keys, list(heads), result, progress)
    except _Found as found:
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
        horizon = _horizon(session)
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
                raise _Found(Problem("seal", seal.id, f"seal {last_id + 1} before it is missing"))
            leaves = _check_seal(session, seal, builder, through, keys, horizon)
            through = {kind: _range(seal, kind, through)[1] for kind in KIND_ORDER}
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
            raise _Found(
                Problem(
                    "seal",
                    seal_id,
                    "differs from the signed head kept outside the database: the log was rewritten",
                )
            )
        last_id = seal_id
        progress(f"verified seal {seal_id}: {result.records_checked:,} records so far")
    if horizon.seal > last_id:
        raise _Found(
            Problem(
                "purge",
                0,
                f"a sealed purge record names seal {horizon.seal}, after the last seal {last_id}",
            )
        )
    if mirrored:
        first = min(mirrored)
        raise _Found(
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
                raise _Found(
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
        raise _Found(
            Problem("api_key", int(stray), "has no creation event in the log: it was inserted")
        )
    _check_tally_batches(factory, purged_through, result, progress)


def _head_seal_id(head: Mapping[str, Any]) -> int:
    try:
        return int(TreeHead.from_payload(dict(head["head"])).seal_id)
    except (KeyError, TypeError, ValueError):
        raise _Found(Problem("seal", 0, "a head kept outside the database is malformed")) from None
