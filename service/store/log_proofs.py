"""Inclusion and consistency proofs over the log, in RFC 9162's terms (queries only).

A proof is computed against a signed head (a seal's tree size and root). Subtree hashes come
from the tree nodes kept at sealing for every aligned subtree of at least ``BLOCK`` leaves;
smaller ones are recomputed from the records (at most one block's). The caller checks a proof
with RFC 9162's verification algorithms (``service.log.merkle.verify_inclusion`` and
``verify_consistency``, or any independent implementation) against the head's root.

After a retention purge the purged records' leaves come from the leaf hashes kept for them
(``purged_leaves``), so every proof of a kept record, and every consistency proof, still
computes; a proof of a purged record is refused (404 ``purged``): the record is gone.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service.errors import NotFound, Unprocessable
from service.log.merkle import TreeBuilder, aligned_blocks, consistency_path, inclusion_path
from service.log.merkle import leaf_hash as merkle_leaf_hash
from service.log.records import DECISION
from service.store.audit_models import PurgedLeaves, Seal, TreeNode
from service.store.feedback import canonical_recommendation_id
from service.store.log_sources import KIND_ORDER, PURGED_KINDS, SOURCES
from service.store.models import Recommendation
from service.store.retention import purge_horizon
from service.store.sealing import BLOCK, signed_head


@dataclass(frozen=True)
class InclusionProof:
    kind: str
    record_id: int
    leaf_index: int
    leaf: bytes
    record: bytes
    path: list[bytes]
    head: dict[str, Any]

    def as_json(self) -> dict[str, Any]:
        """The proof as the API and the CLI give it (hashes in hex, the record as text)."""
        return {
            "kind": self.kind,
            "record_id": self.record_id,
            "leaf_index": self.leaf_index,
            "leaf_hash": self.leaf.hex(),
            "record": self.record.decode("utf-8"),
            "path": [h.hex() for h in self.path],
            "head": self.head,
        }


@dataclass(frozen=True)
class ConsistencyProof:
    first: dict[str, Any]
    second: dict[str, Any]
    path: list[bytes]

    def as_json(self) -> dict[str, Any]:
        return {"first": self.first, "second": self.second, "path": [h.hex() for h in self.path]}


def _seal(session: Session, seal_id: int | None) -> Seal:
    if seal_id is None:
        seal = session.scalars(select(Seal).order_by(Seal.id.desc()).limit(1)).first()
        if seal is None:
            raise NotFound("the log has no seal yet", code="no_seal")
        return seal
    seal = session.get(Seal, seal_id)
    if seal is None:
        raise NotFound(f"no seal {seal_id}", code="unknown_seal", field="seal")
    return seal


def _ranges(seal: Seal) -> dict[str, tuple[int, int, int]]:
    return {k: (int(v[0]), int(v[1]), int(v[2])) for k, v in seal.ranges.items()}


def seal_holding(session: Session, kind: str, record_id: int) -> Seal | None:
    """The seal whose range of ``kind`` holds ``record_id`` (binary search: the ranges of
    consecutive seals follow each other)."""
    last = session.scalar(select(func.max(Seal.id)))
    lo, hi = 1, int(last or 0)
    while lo <= hi:
        mid = (lo + hi) // 2
        seal = session.get(Seal, mid)
        if seal is None:
            return None
        after, through, _ = _ranges(seal).get(kind, (0, 0, 0))
        if record_id <= after:
            hi = mid - 1
        elif record_id > through:
            lo = mid + 1
        else:
            return seal
    return None


def _position(session: Session, seal: Seal, kind: str, record_id: int) -> int:
    start = int(seal.tree_size) - int(seal.leaf_count)
    ranges = _ranges(seal)
    for earlier in KIND_ORDER:
        if earlier == kind:
            break
        start += ranges.get(earlier, (0, 0, 0))[2]
    t = SOURCES[kind].table
    after = ranges[kind][0]
    before = session.scalar(
        select(func.count()).select_from(t).where(t.c.id > after, t.c.id < record_id)
    )
    return start + int(before or 0)


def _leaf_hashes(session: Session, lo: int, hi: int) -> list[bytes]:
    """The leaf hashes of positions ``[lo, hi)``, recomputed from the records."""
    out: list[bytes] = []
    while lo < hi:
        seal = session.scalars(
            select(Seal).where(Seal.tree_size > lo).order_by(Seal.id).limit(1)
        ).first()
        if seal is None:
            raise NotFound(f"leaf {lo} is not sealed", code="not_sealed")
        at = int(seal.tree_size) - int(seal.leaf_count)
        for kind in KIND_ORDER:
            after, through, count = _ranges(seal).get(kind, (0, 0, 0))
            if lo >= at + count:
                at += count
                continue
            source = SOURCES[kind]
            take = min(hi, at + count) - lo
            kept = _kept_hashes(session, seal.id, kind)
            if kept is not None:
                first = 32 * (lo - at)
                out += [kept[i : i + 32] for i in range(first, first + 32 * take, 32)]
            else:
                stmt = source.page(after, through, take).offset(lo - at)
                for row in session.execute(stmt):
                    out.append(merkle_leaf_hash(source.encode(row)))
            lo += take
            at += count
            if lo >= hi:
                break
    return out


def _kept_hashes(session: Session, seal_id: int, kind: str) -> bytes | None:
    """The leaf hashes a purge kept of the seal's records of ``kind`` (None when not purged)."""
    if kind not in PURGED_KINDS:
        return None
    blob = session.scalar(
        select(PurgedLeaves.hashes).where(
            PurgedLeaves.seal_id == seal_id, PurgedLeaves.kind == kind
        )
    )
    return None if blob is None else bytes(blob)


class Tree:
    """Subtree hashes of the log: stored nodes, or leaves recomputed (cached per call)."""

    def __init__(self, session: Session) -> None:
        self.session = session

    def perfect(self, start: int, size: int) -> bytes:
        if size >= BLOCK:
            level = size.bit_length() - 1
            node = self.session.get(TreeNode, (level, start // size))
            if node is None:
                raise NotFound(f"tree node ({level}, {start // size}) is missing: verify the log")
            return bytes(node.hash)
        builder = TreeBuilder()
        builder.add_leaf_hashes(_leaf_hashes(self.session, start, start + size))
        return builder.root()

    def root_of(self, lo: int, hi: int) -> bytes:
        builder = TreeBuilder()
        for start, size in aligned_blocks(lo, hi):
            builder.add_subtree(size, self.perfect(start, size))
        return builder.root()


def decision_row_id(session: Session, recommendation_id: str) -> int | None:
    """The row id of the decision with this recommendation_id (None when there is none)."""
    canonical = canonical_recommendation_id(recommendation_id)
    if canonical is None:
        return None
    found = session.scalar(
        select(Recommendation.id).where(Recommendation.recommendation_id == canonical)
    )
    return None if found is None else int(found)


def record_row_id(
    session: Session, kind: str, record_id: int | None, recommendation_id: str | None
) -> int:
    """The row id a proof request names: a row id, or a decision's recommendation_id."""
    if (record_id is None) == (recommendation_id is None):
        raise Unprocessable("give either id or recommendation_id", field="id")
    if record_id is not None:
        return record_id
    if kind != DECISION:
        raise Unprocessable("recommendation_id names a decision: use kind=decision", field="kind")
    found = decision_row_id(session, str(recommendation_id))
    if found is None:
        raise NotFound(f"no recommendation {recommendation_id!r}", code="unknown_recommendation")
    return found


def inclusion(
    session: Session, kind: str, record_id: int, seal_id: int | None = None
) -> InclusionProof:
    """The proof that record ``record_id`` of ``kind`` is leaf ``leaf_index`` of the tree
    of seal ``seal_id`` (the latest seal by default)."""
    if kind not in SOURCES:
        raise Unprocessable(
            f"unknown kind {kind!r} (one of: {', '.join(KIND_ORDER)})", field="kind"
        )
    head_seal = _seal(session, seal_id)
    holder = seal_holding(session, kind, record_id)
    if holder is None or holder.id > head_seal.id:
        raise NotFound(
            f"{kind} #{record_id} is not in the log as of seal {head_seal.id} (unknown, or "
            "not sealed yet)",
            code="not_sealed",
        )
    if kind in PURGED_KINDS and holder.id <= purge_horizon(session):
        raise NotFound(
            f"{kind} #{record_id} was deleted by a retention purge (its seal {holder.id} is "
            "purged): the log keeps its leaf hash, not the record",
            code="purged",
        )
    source = SOURCES[kind]
    row = session.execute(source.page(record_id - 1, record_id, 1)).first()
    if row is None:
        raise NotFound(f"no {kind} #{record_id}", code="unknown_record")
    record = source.encode(row)
    index = _position(session, holder, kind, record_id)
    size = int(head_seal.tree_size)
    path = inclusion_path(size, index, Tree(session).root_of)
    return InclusionProof(
        kind, record_id, index, merkle_leaf_hash(record), record, path, signed_head(head_seal)
    )


def consistency(session: Session, first: int, second: int) -> ConsistencyProof:
    """The proof that the tree of seal ``first`` is a prefix of the tree of seal ``second``."""
    if first > second:
        raise Unprocessable("the first seal must not come after the second", field="first")
    a, b = _seal(session, first), _seal(session, second)
    path = consistency_path(int(a.tree_size), int(b.tree_size), Tree(session).root_of)
    return ConsistencyProof(signed_head(a), signed_head(b), path)
