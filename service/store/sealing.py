"""Sealing the log: a signed tree head over every record not sealed yet, by id ranges.

A seal covers, per kind of record (``service.store.log_sources``), the ids from the previous
seal's last one (exclusive) up to a *watermark* below which every id is committed. On
PostgreSQL ids are handed out before commit, so the watermark is read under ``LOCK TABLE ...
IN SHARE MODE``: the lock waits for every transaction still inserting into those tables and
holds new inserts back for the moment it takes to read the largest ids; it is released at
once, before any hashing. On SQLite, with its single writer, every id below the largest
committed one is committed too.

Records are read and hashed in read-only transactions (nothing waits for the sealer while it
hashes); the seal, its tree nodes and its signing key's public part are then inserted in one
short transaction. Seals take consecutive ids, so two sealers racing for the same seal
collide on the primary key: the loser rolls back and finds nothing left to seal. Nothing is
ever updated.

Each seal extends the tree of all earlier ones from their *frontier* (the roots of the perfect
subtrees of the leaves so far), so sealing costs the new records only. Every completed block
of :data:`BLOCK` leaves, and every larger aligned subtree, is kept as a tree node (proofs then
recompute at most one block), with 8-byte tags of its leaf hashes (verification then names
the bad record).
"""

from __future__ import annotations

import json
import logging
import os
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from sqlalchemy import func, select, text
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from service.log.heads import TreeHead, sign_head
from service.log.merkle import TreeBuilder, leaf_hash, node_hash
from service.log.records import format_timestamp
from service.store.audit_models import Seal, SigningKey, TreeNode
from service.store.db import begin_read_only
from service.store.log_sources import KIND_ORDER, SOURCES, max_id, rows
from service.store.models import utcnow
from service.store.signing import Signer

log = logging.getLogger("evenhand.sealing")

BLOCK_LEVEL = 10
BLOCK = 1 << BLOCK_LEVEL
"""Leaves per block: the unit of tree nodes and leaf tags."""
TAG_BYTES = 8
MAX_LEAVES_PER_SEAL = 100_000

Ranges = dict[str, list[int]]
"""Per kind ``[after, through, count]``."""


@dataclass(frozen=True)
class SealSummary:
    id: int
    leaf_count: int
    tree_size: int
    root: bytes
    ranges: Ranges
    head: TreeHead
    signature: bytes


def frontier_sizes(tree_size: int) -> list[int]:
    """The sizes of the perfect subtrees of a tree of ``tree_size`` leaves, largest first:
    its binary digits."""
    return [1 << bit for bit in range(tree_size.bit_length() - 1, -1, -1) if tree_size >> bit & 1]


def pack_frontier(frontier: list[tuple[int, bytes]]) -> bytes:
    return b"".join(h for _size, h in frontier)


def unpack_frontier(tree_size: int, packed: bytes) -> list[tuple[int, bytes]]:
    sizes = frontier_sizes(tree_size)
    if len(packed) != 32 * len(sizes):
        raise ValueError(f"a frontier of a tree of {tree_size} leaves has {len(sizes)} hashes")
    return [(size, packed[32 * i : 32 * i + 32]) for i, size in enumerate(sizes)]


@dataclass(frozen=True)
class LastSeal:
    """What the next seal continues from (the empty log before the first seal)."""

    id: int
    tree_size: int
    frontier: list[tuple[int, bytes]]
    through: dict[str, int]

    @classmethod
    def of(cls, seal: Seal | None) -> LastSeal:
        if seal is None:
            return cls(0, 0, [], {})
        return cls(
            seal.id,
            int(seal.tree_size),
            unpack_frontier(int(seal.tree_size), bytes(seal.frontier)),
            {kind: int(r[1]) for kind, r in seal.ranges.items()},
        )


def last_seal(session: Session) -> LastSeal:
    return LastSeal.of(session.scalars(select(Seal).order_by(Seal.id.desc()).limit(1)).first())


def block_tags(session: Session, start: int, end: int) -> bytes:
    """The tags of leaves ``[start, end)`` of a block not completed yet, from the seals that
    hold them (each keeps the tags of its own leaves in its last block)."""
    if end <= start:
        return b""
    tags = b""
    for (seal_tags,) in session.execute(
        select(Seal.tags)
        .where(Seal.tree_size > start, Seal.tree_size - Seal.leaf_count < end)
        .order_by(Seal.id)
    ):
        tags += bytes(seal_tags)
    return tags


def watermarks(session: Session) -> dict[str, int]:
    """Per kind, the largest id below which every id is committed (its own transaction)."""
    try:
        if session.get_bind().dialect.name == "postgresql":
            quote = session.get_bind().dialect.identifier_preparer.quote
            names = ", ".join(quote(SOURCES[k].table.name) for k in KIND_ORDER)
            session.execute(text("SET LOCAL lock_timeout = '10s'"))
            session.execute(text(f"LOCK TABLE {names} IN SHARE MODE"))
        else:
            begin_read_only(session)
        marks = {kind: max_id(session, SOURCES[kind]) for kind in KIND_ORDER}
    finally:
        session.rollback()  # releases the lock; nothing was written
    return marks


class BlockTracker:
    """Tracks the block being filled and writes each completed aligned subtree."""

    def __init__(self, previous: LastSeal, session: Session) -> None:
        partial = [(size, h) for size, h in previous.frontier if size < BLOCK]
        self.block = TreeBuilder.resume(partial)
        block_start = previous.tree_size - self.block.count
        self.tags = bytearray(block_tags(session, block_start, previous.tree_size))
        if len(self.tags) != TAG_BYTES * self.block.count:
            raise RuntimeError(
                f"the seals after leaf {block_start} hold {len(self.tags) // TAG_BYTES} tags of "
                f"the {self.block.count} leaves of the current block: the log needs verifying"
            )
        self.own_start = previous.tree_size
        self.session = session
        self.nodes: list[TreeNode] = []
        self._known: dict[tuple[int, int], bytes] = {}

    def add(self, tree_size_after: int, h: bytes) -> None:
        self.block.add_leaf_hash(h)
        self.tags += h[:TAG_BYTES]
        if self.block.count < BLOCK:
            return
        position = tree_size_after // BLOCK - 1
        self._node(BLOCK_LEVEL, position, self.block.root(), bytes(self.tags))
        self.block = TreeBuilder()
        self.tags = bytearray()

    def own_tags(self, tree_size: int) -> bytes:
        """The tags of this seal's own leaves in the block it leaves incomplete."""
        own = min(tree_size - self.own_start, tree_size % BLOCK)
        return bytes(self.tags[len(self.tags) - TAG_BYTES * own :]) if own else b""

    def _node(self, level: int, position: int, h: bytes, tags: bytes | None = None) -> None:
        self.nodes.append(TreeNode(level=level, position=position, hash=h, tags=tags))
        self._known[(level, position)] = h
        if position % 2 == 1:  # a right child: its parent is complete now
            left = self._known.get((level, position - 1))
            if left is None:
                left = self.session.scalar(
                    select(TreeNode.hash).where(
                        TreeNode.level == level, TreeNode.position == position - 1
                    )
                )
                if left is None:
                    raise RuntimeError(f"tree node ({level}, {position - 1}) is missing")
            self._node(level + 1, position // 2, node_hash(bytes(left), h))


def _plan(
    session: Session, previous: LastSeal, marks: dict[str, int], budget: int
) -> dict[str, tuple[int, int]]:
    """Per kind, the ids ``(after, through]`` this seal takes: everything committed, up to
    ``budget`` records in all."""
    plan: dict[str, tuple[int, int]] = {}
    for kind in KIND_ORDER:
        after = previous.through.get(kind, 0)
        through = max(after, marks[kind])
        if budget <= 0:
            through = after
        elif through > after:
            t = SOURCES[kind].table
            boundary = session.scalar(
                select(t.c.id)
                .where(t.c.id > after, t.c.id <= through)
                .order_by(t.c.id)
                .offset(budget - 1)
                .limit(1)
            )
            if boundary is not None:
                through = int(boundary)
            budget -= int(
                session.scalar(
                    select(func.count()).select_from(t).where(t.c.id > after, t.c.id <= through)
                )
                or 0
            )
        plan[kind] = (after, through)
    return plan


def seal_pending(
    factory: sessionmaker[Session],
    signer: Signer,
    *,
    max_leaves: int = MAX_LEAVES_PER_SEAL,
    mirror: str | None = None,
    now: datetime | None = None,
) -> SealSummary | None:
    """Seal up to ``max_leaves`` records not sealed yet; None when there are none, or when
    another sealer sealed them first. Commits its own transactions (a job boundary)."""
    with factory() as session:
        marks = watermarks(session)
        begin_read_only(session)
        previous = last_seal(session)
        plan = _plan(session, previous, marks, max_leaves)
        if all(through == after for after, through in plan.values()):
            session.rollback()
            return None
        builder = TreeBuilder.resume(previous.frontier)
        if builder.count != previous.tree_size:
            raise RuntimeError(f"seal {previous.id}: its frontier does not add up to its size")
        blocks = BlockTracker(previous, session)
        ranges: Ranges = {}
        for kind in KIND_ORDER:
            after, through = plan[kind]
            count = 0
            for row in rows(session, SOURCES[kind], after, through):
                h = leaf_hash(SOURCES[kind].encode(row))
                builder.add_leaf_hash(h)
                blocks.add(builder.count, h)
                count += 1
            ranges[kind] = [after, through, count]
        session.rollback()
        created = now or utcnow()
        seal_id = previous.id + 1
        head = TreeHead(
            seal_id, builder.count, builder.root(), format_timestamp(created), signer.key_id
        )
        signature = sign_head(head, signer.key)
        seal = Seal(
            id=seal_id,
            created_at=created,
            ranges=ranges,
            leaf_count=builder.count - previous.tree_size,
            tree_size=builder.count,
            root=head.root,
            frontier=pack_frontier(builder.frontier()),
            tags=blocks.own_tags(builder.count),
            key_id=signer.key_id,
            signature=signature,
        )
        try:
            if session.get(SigningKey, signer.key_id) is None:
                session.add(
                    SigningKey(
                        key_id=signer.key_id, public_key=signer.public_key, first_used_at=created
                    )
                )
                session.flush()
            session.add(seal)
            session.flush()
            session.add_all(blocks.nodes)
            session.commit()
        except IntegrityError:
            session.rollback()
            log.info("seal %d was written by another sealer first", seal_id)
            return None
    summary = SealSummary(
        seal_id,
        builder.count - previous.tree_size,
        builder.count,
        head.root,
        ranges,
        head,
        signature,
    )
    if mirror:
        append_heads(factory, mirror)
    return summary


def seal_all_pending(
    factory: sessionmaker[Session],
    signer: Signer,
    *,
    max_leaves: int = MAX_LEAVES_PER_SEAL,
    mirror: str | None = None,
) -> list[SealSummary]:
    """Seal until nothing is left (several seals when there are many records)."""
    seals: list[SealSummary] = []
    while (seal := seal_pending(factory, signer, max_leaves=max_leaves, mirror=mirror)) is not None:
        seals.append(seal)
    return seals


def head_of(seal: Seal) -> TreeHead:
    return TreeHead(
        seal.id,
        int(seal.tree_size),
        bytes(seal.root),
        format_timestamp(seal.created_at),
        seal.key_id,
    )


def signed_head(seal: Seal) -> dict[str, Any]:
    """A seal's signed head as published: ``{"head": {...}, "signature": hex}``."""
    return {"head": head_of(seal).payload(), "signature": bytes(seal.signature).hex()}


def _last_mirrored(target: Path) -> int:
    """The seal id of the mirror file's last line (0 for a missing or empty file)."""
    if not target.exists():
        return 0
    with target.open("rb") as handle:
        handle.seek(0, os.SEEK_END)
        size = handle.tell()
        handle.seek(max(0, size - 4096))
        lines = handle.read().splitlines()
    if not lines:
        return 0
    return int(json.loads(lines[-1])["head"]["seal_id"])


def append_heads(factory: sessionmaker[Session], path: str) -> int:
    """Append to the mirror file every head it does not hold yet; the number appended. A
    mirror that cannot be written is logged, not fatal: the next seal tries again."""
    target = Path(path)
    try:
        last = _last_mirrored(target)
        with factory() as session:
            begin_read_only(session)
            heads = [
                signed_head(seal)
                for seal in session.scalars(select(Seal).where(Seal.id > last).order_by(Seal.id))
            ]
            session.rollback()
        if not heads:
            return 0
        with target.open("a", encoding="utf-8") as handle:
            for head in heads:
                handle.write(json.dumps(head, sort_keys=True) + "\n")
            handle.flush()
            os.fsync(handle.fileno())
        return len(heads)
    except (OSError, ValueError, KeyError, TypeError) as exc:
        log.error("the head mirror %s cannot be written: %s", path, exc)
        return 0
