"""Writing one policy-month of the log as a bundle (``service.log.bundle_format``; queries only).

The bundle holds the records of the month: the decisions of the policy issued in the month (in
the time zone of its report snapshot), every outcome record and final decision about them,
the policy's versions and lifecycle events, every key event, and the snapshot record itself;
all as sealed in the seals up to the one holding the snapshot. Every other leaf of the log up
to that seal is given only as the roots of aligned perfect subtrees, so a verifier recomputes
the signed tree head without seeing another policy's or month's records. The snapshot's two
views, the signed heads and the public keys complete it.

The exporter reads the seals in pages and each seal's ranges of ids a page at a time; what it
keeps in memory is the ids of the month's records (integers), not the records.
"""

from __future__ import annotations

import bisect
import hashlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any, BinaryIO

from sqlalchemy import ColumnElement, select
from sqlalchemy.orm import Session

from service.audit.month import Month
from service.errors import NotFound, Unprocessable
from service.log import audit_records, policy_records
from service.log.bundle_format import (
    CHECKPOINT_RECORDS,
    FORMAT,
    HEAD,
    HEADER,
    KEY,
    LATEST,
    MANIFEST,
    RECORD,
    SUBTREE,
    VIEW,
    encode_line,
    leaf_hex,
)
from service.log.merkle import aligned_blocks, consistency_path
from service.log.records import DECISION
from service.store.audit_models import AuditSnapshot, Seal, SigningKey
from service.store.log_proofs import Tree, seal_holding
from service.store.log_sources import KIND_ORDER, PAGE, SOURCES, Source, decision_window, rows
from service.store.retention import purged_through_month
from service.store.sealing import signed_head

Progress = Callable[[str], None]

_BOUND = (DECISION, audit_records.OUTCOME, audit_records.FINAL)


def _quiet(_message: str) -> None:
    return None


@dataclass
class BundleSummary:
    """What one export wrote."""

    policy: str
    month: str
    snapshot_id: int
    seal_id: int
    tree_size: int
    lines: dict[str, int] = field(default_factory=dict)
    records: dict[str, int] = field(default_factory=dict)
    sha256: str = ""
    bytes_written: int = 0


class _Writer:
    """Writes lines, counts them and hashes every byte (the manifest's digest)."""

    def __init__(self, out: BinaryIO, summary: BundleSummary) -> None:
        self.out = out
        self.summary = summary
        self.hash = hashlib.sha256()

    def line(self, value: dict[str, Any]) -> None:
        data = encode_line(value)
        self.out.write(data)
        self.hash.update(data)
        kind = str(value["type"])
        self.summary.lines[kind] = self.summary.lines.get(kind, 0) + 1
        self.summary.bytes_written += len(data)


def latest_snapshot(session: Session, policy: str, month: Month) -> AuditSnapshot:
    snapshot = session.scalars(
        select(AuditSnapshot)
        .where(AuditSnapshot.policy == policy, AuditSnapshot.month == str(month))
        .order_by(AuditSnapshot.created_at.desc(), AuditSnapshot.id.desc())
        .limit(1)
    ).first()
    if snapshot is None:
        raise NotFound(
            f"no report snapshot of {policy!r} for {month}: run `evenhand audit` first",
            code="no_snapshot",
        )
    return snapshot


def _conditions(
    kind: str, policy: str, window: tuple[ColumnElement[bool], ...], snapshot_id: int
) -> tuple[ColumnElement[bool], ...] | None:
    """Which records of ``kind`` the bundle holds (None: none of them)."""
    source = SOURCES[kind]
    if kind in _BOUND:
        return window
    if kind in (policy_records.POLICY_VERSION, policy_records.POLICY_EVENT):
        return (source.table.c.name == policy,)
    if kind == policy_records.KEY_EVENT:
        return ()
    if kind == audit_records.SNAPSHOT:
        return (source.table.c.id == snapshot_id,)
    return None


def _selected_ids(
    session: Session, source: Source, where: tuple[ColumnElement[bool], ...], through: int
) -> list[int]:
    t = source.table
    stmt = source.joined(select(t.c.id)).where(t.c.id > 0, t.c.id <= through, *where)
    return [int(i) for i in session.scalars(stmt.order_by(t.c.id))]


def _ids(session: Session, source: Source, after: int, through: int) -> Iterator[int]:
    """Every id of ``source`` in ``(after, through]``, in order, a page at a time."""
    t = source.table
    last = after
    while last < through:
        page = [
            int(i)
            for i in session.scalars(
                select(t.c.id)
                .where(t.c.id > last, t.c.id <= through)
                .order_by(t.c.id)
                .limit(PAGE * 4)
            )
        ]
        yield from page
        if len(page) < PAGE * 4:
            return
        last = page[-1]


def _seals(session: Session, through: int) -> Iterator[Seal]:
    last = 0
    while last < through:
        page = list(
            session.scalars(
                select(Seal).where(Seal.id > last, Seal.id <= through).order_by(Seal.id).limit(500)
            )
        )
        yield from page
        if not page:
            return
        last = page[-1].id
        session.expunge_all()


def export_month(
    session: Session,
    policy: str,
    month: Month,
    out: BinaryIO,
    *,
    progress: Progress = _quiet,
) -> BundleSummary:
    """Write the bundle of ``policy`` for ``month`` to ``out`` (read-only; the caller's
    transaction should be a read-only one)."""
    purged = purged_through_month(session)
    if purged is not None and month <= purged:
        raise Unprocessable(
            f"the decisions of {month} were purged (retention, through {purged}): the month's "
            "records are gone, only its report snapshot and leaf hashes remain",
            field="month",
            code="purged_month",
        )
    snapshot = latest_snapshot(session, policy, month)
    if snapshot.internal is None or snapshot.internal_digest is None:
        raise Unprocessable(
            f"snapshot {snapshot.id} predates internal views: run `evenhand audit` again",
            code="old_snapshot",
        )
    holder = seal_holding(session, audit_records.SNAPSHOT, snapshot.id)
    if holder is None:
        raise Unprocessable(
            f"the report snapshot of {policy} for {month} is not sealed yet: run "
            "`evenhand log seal` first",
            code="not_sealed",
        )
    start, end = month.bounds(snapshot.time_zone)
    window = decision_window(policy, start, end)
    holder_ranges = {k: (int(v[0]), int(v[1])) for k, v in holder.ranges.items()}
    summary = BundleSummary(policy, str(month), snapshot.id, holder.id, int(holder.tree_size))
    writer = _Writer(out, summary)
    writer.line(
        {
            "type": HEADER,
            "format": FORMAT,
            "policy": policy,
            "month": str(month),
            "time_zone": snapshot.time_zone,
            "snapshot_created_at": snapshot.created_at.isoformat(),
            "seal_id": holder.id,
            "tree_size": int(holder.tree_size),
        }
    )
    for key in session.scalars(select(SigningKey).order_by(SigningKey.key_id)):
        writer.line({"type": KEY, "key_id": key.key_id, "public_key": bytes(key.public_key).hex()})

    selected: dict[str, list[int]] = {}
    for kind in KIND_ORDER:
        where = _conditions(kind, policy, window, snapshot.id)
        through = holder_ranges.get(kind, (0, 0))[1]
        if where is not None and through > 0:
            selected[kind] = _selected_ids(session, SOURCES[kind], where, through)
    progress(
        f"bundle of {policy} for {month}: "
        + ", ".join(f"{len(v):,} {k}" for k, v in selected.items() if v)
        + f"; seals 1 to {holder.id}, {int(holder.tree_size):,} leaves"
    )

    tree = Tree(session)
    position = 0  # the next leaf the bundle has not given yet
    since_head = 0

    def flush(upto: int) -> None:
        nonlocal position
        for block_start, size in aligned_blocks(position, upto):
            writer.line(
                {
                    "type": SUBTREE,
                    "start": block_start,
                    "size": size,
                    "hash": tree.perfect(block_start, size).hex(),
                }
            )
        position = upto

    for seal in _seals(session, holder.id):
        at = int(seal.tree_size) - int(seal.leaf_count)
        for kind in KIND_ORDER:
            after, through, count = (int(x) for x in seal.ranges.get(kind, (0, 0, 0)))
            ids = selected.get(kind)
            lo = bisect.bisect_right(ids, after) if ids else 0
            if not ids or lo >= len(ids) or ids[lo] > through:
                at += count
                continue
            source = SOURCES[kind]
            where = _conditions(kind, policy, window, snapshot.id) or ()
            chosen = rows(session, source, after, through, where)
            wanted = next(chosen, None)
            for index, row_id in enumerate(_ids(session, source, after, through)):
                if wanted is None:
                    break
                if row_id != int(wanted.id):
                    continue
                flush(at + index)
                data = source.encode(wanted)
                writer.line(
                    {
                        "type": RECORD,
                        "index": at + index,
                        "kind": kind,
                        "leaf": leaf_hex(data),
                        "data": data.decode("utf-8"),
                    }
                )
                summary.records[kind] = summary.records.get(kind, 0) + 1
                position = at + index + 1
                since_head += 1
                wanted = next(chosen, None)
            at += count
        if seal.id == holder.id or since_head >= CHECKPOINT_RECORDS:
            flush(int(seal.tree_size))
            writer.line({"type": HEAD, **signed_head(seal)})
            since_head = 0
    latest = session.scalars(select(Seal).order_by(Seal.id.desc()).limit(1)).first()
    if latest is not None and latest.id > holder.id:
        path = consistency_path(int(holder.tree_size), int(latest.tree_size), tree.root_of)
        writer.line({"type": LATEST, **signed_head(latest), "path": [h.hex() for h in path]})
    writer.line({"type": VIEW, "view": "published", "content": snapshot.content})
    writer.line({"type": VIEW, "view": "internal", "content": snapshot.internal})
    summary.sha256 = writer.hash.hexdigest()
    lines = dict(summary.lines)
    lines[MANIFEST] = 1
    writer.line(
        {
            "type": MANIFEST,
            "lines": lines,
            "records": dict(summary.records),
            "sha256": summary.sha256,
        }
    )
    progress(
        f"wrote {sum(summary.records.values()):,} records in {sum(summary.lines.values()):,} "
        f"lines ({summary.bytes_written:,} bytes)"
    )
    return summary
