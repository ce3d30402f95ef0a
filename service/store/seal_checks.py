"""Checking one seal of the log: its records read afresh and hashed, its tree, signature,
tree nodes and tags, and the kept leaf hashes of records a retention purge removed (see
:mod:`service.store.log_verify`). Every check raises
:class:`~service.store.verify_problems.Found` with the first problem."""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service.log.audit_records import SNAPSHOT
from service.log.heads import verify_head
from service.log.merkle import TreeBuilder, leaf_hash
from service.log.records import canonical
from service.store.audit_models import LogPurge, PurgedLeaves, Seal, TreeNode
from service.store.db import begin_read_only
from service.store.log_sources import KIND_ORDER, PURGED_KINDS, SOURCES, rows
from service.store.sealing import (
    BLOCK,
    BLOCK_LEVEL,
    TAG_BYTES,
    BlockTracker,
    LastSeal,
    head_of,
    pack_frontier,
)
from service.store.verify_problems import Found, Problem


@dataclass(frozen=True)
class Leaf:
    kind: str
    id: int
    """The record's row id (0 for a purged record's kept hash)."""
    hash: bytes


@dataclass(frozen=True)
class Horizon:
    seal: int = 0
    """The largest through_seal of the sealed purge records (0: nothing purged)."""
    purge: int = 0
    """The purge record that names it."""
    unsealed_seal: int = 0
    """The same among purge rows no seal covers yet (only to explain a failure)."""
    unsealed_purge: int = 0


def read_horizon(session: Session) -> Horizon:
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
    return Horizon(best[0], best[1], unsealed[0], unsealed[1])


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
) -> list[Leaf]:
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
        raise Found(
            Problem(
                "purge",
                purge_id,
                f"says the records of seal {seal.id} were purged, but its {kind} records are "
                "there and no hashes of them were kept: the purge record was forged or edited",
            )
        )
    if left is not None:
        raise Found(
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
        raise Found(
            Problem(
                "seal",
                seal.id,
                f"the leaf hashes kept for its {count} purged {kind} records are missing or "
                "incomplete",
            )
        )
    return [Leaf(kind, 0, data[i : i + 32]) for i in range(0, len(data), 32)]


def _leaves(
    session: Session, seal: Seal, prev_through: dict[str, int], horizon: Horizon
) -> list[Leaf]:
    leaves: list[Leaf] = []
    for kind in KIND_ORDER:
        after, through, count = seal_range(seal, kind, prev_through)
        if seal.id <= horizon.seal and kind in PURGED_KINDS:
            leaves += _kept_leaves(session, seal, kind, (after, through, count), horizon.purge)
            continue
        source = SOURCES[kind]
        try:
            for row in rows(session, source, after, through):
                try:
                    data = source.encode(row)
                except Exception as exc:  # any stored value: report, never raise
                    raise Found(
                        Problem(kind, int(row.id), f"cannot be read as a {kind} record: {exc}")
                    ) from None
                if kind == SNAPSHOT and (reason := _snapshot_problem(row)) is not None:
                    raise Found(Problem(kind, int(row.id), reason))
                leaves.append(Leaf(kind, int(row.id), leaf_hash(data)))
        except Found:
            raise
        except Exception as exc:  # the driver could not even decode a row of the page
            session.rollback()
            begin_read_only(session)
            raise Found(_unreadable(session, kind, after, through, exc)) from None
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


def seal_range(seal: Seal, kind: str, prev_through: dict[str, int]) -> tuple[int, int, int]:
    ranges = seal.ranges if isinstance(seal.ranges, Mapping) else {}
    value = ranges.get(kind, [prev_through.get(kind, 0), prev_through.get(kind, 0), 0])
    try:
        after, through, count = (int(x) for x in value)
    except (TypeError, ValueError):
        raise Found(Problem("seal", seal.id, f"its range of {kind} records is malformed")) from None
    if after != prev_through.get(kind, 0) or through < after or count < 0:
        raise Found(
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


def _name_bad_leaf(leaves: list[Leaf], expected: list[bytes | None], seal: Seal) -> Problem:
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
            raise Found(Problem("tree_node", 0, f"{where} is missing"))
        if bytes(stored.hash) != node.hash or (
            node.tags is not None and bytes(stored.tags or b"") != node.tags
        ):
            raise Found(Problem("tree_node", 0, f"{where} does not match its leaves"))
    if bytes(seal.tags) != blocks.own_tags(int(seal.tree_size)):
        raise Found(Problem("seal", seal.id, "its stored leaf tags do not match its leaves"))


def check_seal(
    session: Session,
    seal: Seal,
    builder: TreeBuilder,
    prev_through: dict[str, int],
    keys: dict[str, bytes],
    horizon: Horizon,
) -> list[Leaf]:
    start = builder.count
    leaves = _leaves(session, seal, prev_through, horizon)
    try:
        blocks = BlockTracker(
            LastSeal(seal.id - 1, start, builder.frontier(), prev_through), session
        )
    except RuntimeError as exc:
        raise Found(Problem("seal", seal.id - 1, str(exc))) from None
    for leaf in leaves:
        builder.add_leaf_hash(leaf.hash)
        try:
            blocks.add(builder.count, leaf.hash)
        except RuntimeError as exc:
            raise Found(Problem("tree_node", 0, str(exc))) from None
    counts = {kind: seal_range(seal, kind, prev_through)[2] for kind in KIND_ORDER}
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
        raise Found(bad)
    if bytes(seal.frontier) != pack_frontier(builder.frontier()):
        raise Found(Problem("seal", seal.id, "its stored frontier does not match its leaves"))
    problem = verify_head(head_of(seal), bytes(seal.signature), keys)
    if problem is not None:
        raise Found(Problem("seal", seal.id, problem))
    _check_nodes(session, blocks, seal)
    return leaves
