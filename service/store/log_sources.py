"""The kinds of record the log seals, and how each is read back from its table (queries only).

Every kind is an insert-only table with an integer id; a seal covers, per kind, the ids in
``(after, through]``. A seal's leaves are the records of each kind in id order, the kinds in
:data:`KIND_ORDER`. Each kind reads its rows in pages by id (``id > last`` and ``id <= through``,
the primary key's order), with whatever it needs from other tables to encode them: an
outcome or a final decision names its decision by ``recommendation_id``.

``decision_facts`` turns a decision (or an outcome or final decision joined to its
decision) into what the audit tallies need.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from datetime import tzinfo
from typing import Any

from sqlalchemy import ColumnElement, Select, Table, func, select
from sqlalchemy.orm import Session

from service.log import audit_records, policy_records
from service.log.records import DECISION, record_bytes
from service.log.tallies import DecisionFacts
from service.store.audit_models import (
    AuditSnapshot,
    FinalDecision,
    LogPurge,
    OutcomeRecord,
    TallyBatch,
)
from service.store.models import ApiKey, KeyEvent, PolicyEvent, PolicyVersion, Recommendation

PAGE = 5_000

_REC: Table = Recommendation.__table__  # type: ignore[assignment]
_OUT: Table = OutcomeRecord.__table__  # type: ignore[assignment]
_FIN: Table = FinalDecision.__table__  # type: ignore[assignment]
_SNAP: Table = AuditSnapshot.__table__  # type: ignore[assignment]
_BATCH: Table = TallyBatch.__table__  # type: ignore[assignment]
_PURGE: Table = LogPurge.__table__  # type: ignore[assignment]
_VERSION: Table = PolicyVersion.__table__  # type: ignore[assignment]
_EVENT: Table = PolicyEvent.__table__  # type: ignore[assignment]
_KEY_EVENT: Table = KeyEvent.__table__  # type: ignore[assignment]
_KEY: Table = ApiKey.__table__  # type: ignore[assignment]

FACT_COLUMNS = (
    "policy",
    "version",
    "group",
    "shadow_version",
    "issued_at",
    "action",
    "probability",
    "shadow_action",
    "score",
)
"""The decision's columns a tally needs, joined to outcomes and final decisions under these
names."""


@dataclass(frozen=True)
class Source:
    """One kind of log record: its table, the statement reading a page of it, its
    encoding, and the condition restricting it to the decisions of a policy issued in a
    window (None for kinds that are not about a decision)."""

    kind: str
    table: Table
    columns: tuple[Any, ...]
    joined: Callable[[Select[Any]], Select[Any]]
    encode: Callable[[Any], bytes]
    about_decisions: bool

    def page(
        self, after: int, through: int, limit: int, where: tuple[ColumnElement[bool], ...] = ()
    ) -> Select[Any]:
        t = self.table
        stmt = select(*self.columns)
        stmt = self.joined(stmt).where(t.c.id > after, t.c.id <= through, *where)
        return stmt.order_by(t.c.id).limit(limit)


def _facts(prefix: str = "") -> tuple[Any, ...]:
    return tuple(_REC.c[name].label(f"{prefix}{name}") for name in FACT_COLUMNS)


def _no_join(stmt: Select[Any]) -> Select[Any]:
    return stmt


def _join_decision(table: Table) -> Callable[[Select[Any]], Select[Any]]:
    def join(stmt: Select[Any]) -> Select[Any]:
        return stmt.select_from(table.join(_REC, _REC.c.id == table.c.recommendation_pk))

    return join


def _join_key(stmt: Select[Any]) -> Select[Any]:
    return stmt.select_from(_KEY_EVENT.join(_KEY, _KEY.c.id == _KEY_EVENT.c.key_id))


def _key_event_bytes(row: Any) -> bytes:
    key = {
        "id": row.key_id,
        "name": row.key_name,
        "role": row.key_role,
        "token_hash": row.key_token_hash,
        "created_at": row.key_created_at,
    }
    return policy_records.key_event_bytes(row, key)


_VERSION_SOURCE = Source(
    policy_records.POLICY_VERSION,
    _VERSION,
    tuple(_VERSION.c),
    _no_join,
    policy_records.policy_version_bytes,
    False,
)
_EVENT_SOURCE = Source(
    policy_records.POLICY_EVENT,
    _EVENT,
    tuple(_EVENT.c),
    _no_join,
    policy_records.policy_event_bytes,
    False,
)
_KEY_EVENT_SOURCE = Source(
    policy_records.KEY_EVENT,
    _KEY_EVENT,
    (
        *_KEY_EVENT.c,
        _KEY.c.name.label("key_name"),
        _KEY.c.role.label("key_role"),
        _KEY.c.token_hash.label("key_token_hash"),
        _KEY.c.created_at.label("key_created_at"),
    ),
    _join_key,
    _key_event_bytes,
    False,
)
_DECISION_SOURCE = Source(
    DECISION,
    _REC,
    tuple(c for c in _REC.c if c.name != "request_fingerprint"),
    _no_join,
    record_bytes,
    True,
)
_OUTCOME_SOURCE = Source(
    audit_records.OUTCOME,
    _OUT,
    (*_OUT.c, _REC.c.recommendation_id, *(_facts())),
    _join_decision(_OUT),
    audit_records.outcome_bytes,
    True,
)
_FINAL_SOURCE = Source(
    audit_records.FINAL,
    _FIN,
    (*_FIN.c, _REC.c.recommendation_id, *(_facts())),
    _join_decision(_FIN),
    audit_records.final_bytes,
    True,
)
_SNAPSHOT_SOURCE = Source(
    audit_records.SNAPSHOT, _SNAP, tuple(_SNAP.c), _no_join, audit_records.snapshot_bytes, False
)
_BATCH_SOURCE = Source(
    audit_records.TALLY_BATCH,
    _BATCH,
    tuple(_BATCH.c),
    _no_join,
    audit_records.tally_batch_bytes,
    False,
)
_PURGE_SOURCE = Source(
    audit_records.PURGE, _PURGE, tuple(_PURGE.c), _no_join, audit_records.purge_bytes, False
)

SOURCES: dict[str, Source] = {
    s.kind: s
    for s in (
        _VERSION_SOURCE,
        _EVENT_SOURCE,
        _KEY_EVENT_SOURCE,
        _DECISION_SOURCE,
        _OUTCOME_SOURCE,
        _FINAL_SOURCE,
        _SNAPSHOT_SOURCE,
        _BATCH_SOURCE,
        _PURGE_SOURCE,  # appended with revision 0070: older seals have no purge range
    )
}
KIND_ORDER: tuple[str, ...] = tuple(SOURCES)
"""The order of the kinds within a seal. Never reordered: old seals are verified with it. A
new kind is only ever appended; a seal written before it existed has no range of it, read as
an empty one."""
TALLIED_KINDS: tuple[str, ...] = (DECISION, audit_records.OUTCOME, audit_records.FINAL)
PURGED_KINDS: tuple[str, ...] = TALLIED_KINDS
"""The kinds a retention purge deletes: the records about a person (their decision, its
outcomes, the final decision). Everything else is kept (``service.store.retention``)."""


def decision_window(policy: str, start: Any, end: Any) -> tuple[ColumnElement[bool], ...]:
    """The condition keeping a decision-bound kind's records about decisions of ``policy``
    issued in ``[start, end)`` (its page statement joins the decision)."""
    return (_REC.c.policy == policy, _REC.c.issued_at >= start, _REC.c.issued_at < end)


def rows(
    session: Session,
    source: Source,
    after: int,
    through: int,
    where: tuple[ColumnElement[bool], ...] = (),
    page: int = PAGE,
) -> Iterator[Any]:
    """The records of ``source`` with ids in ``(after, through]``, in id order, a page at a
    time (memory independent of the range)."""
    last = after
    while last < through:
        batch = session.execute(source.page(last, through, page, where)).all()
        yield from batch
        if len(batch) < page:
            return
        last = int(batch[-1].id)


def max_id(session: Session, source: Source) -> int:
    return int(session.scalar(select(func.coalesce(func.max(source.table.c.id), 0))) or 0)


def decision_facts(row: Any, zone: tzinfo) -> DecisionFacts:
    """The facts a tally needs of the decision in ``row`` (a decision, or an outcome or final
    decision read with its decision's columns); the day is the issue day in ``zone``."""
    get = row._mapping if hasattr(row, "_mapping") else row
    return _facts_of(get, zone)


def _facts_of(get: Mapping[str, Any], zone: tzinfo) -> DecisionFacts:
    shadow = get["shadow_action"]
    shadow_version = get["shadow_version"]
    return DecisionFacts(
        policy=str(get["policy"]),
        version=int(get["version"]),
        group=str(get["group"]),
        shadow_version=None if shadow_version is None else int(shadow_version),
        day=get["issued_at"].astimezone(zone).date(),
        action=bool(get["action"]),
        probability=float(get["probability"]),
        shadow_action=None if shadow is None else bool(shadow),
        score=float(get["score"]),
    )
