"""What scoring decides with: the scoring context, the parsed policy documents and the plan
(a policy's active and shadow version) read in the deciding transaction.

The active version is looked up in the transaction that writes the records (once per policy
and group of requests; one indexed query that also finds the shadow): correct across worker
processes and rollbacks without any invalidation. Only the parsed documents are cached, by
content hash, since a stored version never changes.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

from sqlalchemy import Connection, bindparam, select
from sqlalchemy.dialects import sqlite
from sqlalchemy.orm import aliased

from service.errors import Conflict, Unprocessable
from service.policy.document import PolicyDocument
from service.store.models import PolicyState, PolicyVersion


class DocumentCache:
    """Parsed policy documents by (name, version, content hash).

    Stored versions never change, so an entry never goes stale; the content hash in the key
    makes even a database that was emptied and refilled safe.
    """

    def __init__(self) -> None:
        self._docs: dict[tuple[str, int, str], PolicyDocument] = {}
        self._lock = threading.Lock()

    def get(self, conn: Connection, name: str, version: int, digest: str) -> PolicyDocument:
        key = (name, version, digest)
        doc = self._docs.get(key)
        if doc is not None:
            return doc
        data = conn.scalar(
            select(PolicyVersion.document).where(
                PolicyVersion.name == name, PolicyVersion.version == version
            )
        )
        doc = PolicyDocument.model_validate(data)
        with self._lock:
            self._docs[key] = doc
        return doc


@dataclass(frozen=True, slots=True)
class ScoringContext:
    secret: bytes
    documents: DocumentCache
    max_batch_items: int = 10_000


@dataclass(frozen=True, slots=True)
class Plan:
    """What a policy's requests are evaluated with right now."""

    name: str
    version: int
    document: PolicyDocument
    shadow_version: int | None
    shadow: PolicyDocument | None
    stored_attributes: tuple[str, ...]
    """The attributes a record keeps: those either version groups by (data minimisation)."""


_Active = aliased(PolicyVersion)
_Shadow = aliased(PolicyVersion)

# The policy's state row names its active and shadow versions (one primary-key lookup, then
# two on the versions' unique index); an unknown policy has no row, a policy without an
# active version a row whose active version is NULL.
_PLAN_QUERY = (
    select(
        PolicyState.active_version,
        _Active.content_hash,
        PolicyState.shadow_version,
        _Shadow.content_hash,
    )
    .select_from(PolicyState)
    .outerjoin(
        _Active,
        (_Active.name == PolicyState.name) & (_Active.version == PolicyState.active_version),
    )
    .outerjoin(
        _Shadow,
        (_Shadow.name == PolicyState.name) & (_Shadow.version == PolicyState.shadow_version),
    )
    .where(PolicyState.name == bindparam("name"))
)
# The same statement compiled once for the sqlite3 driver: the hot path skips SQLAlchemy's
# statement and result processing (the four columns are plain integers and text), which
# halves its CPU on SQLite. On PostgreSQL the driver-level form measured slower than the
# compiled statement (psycopg), so it runs _PLAN_QUERY.
_PLAN_SQL_SQLITE = str(_PLAN_QUERY.compile(dialect=sqlite.dialect()))


def resolve_plan(conn: Connection, name: str, ctx: ScoringContext) -> Plan:
    """The active (and shadow) version of ``name``, read in the request's transaction."""
    if conn.dialect.name == "sqlite":
        row = conn.exec_driver_sql(_PLAN_SQL_SQLITE, (name,)).first()
    else:
        row = conn.execute(_PLAN_QUERY, {"name": name}).first()
    if row is None:
        raise Unprocessable(f"no policy named {name!r}", code="unknown_policy", field="policy")
    if row[0] is None:
        raise Conflict(
            f"policy {name!r} has no active version: an admin must activate one",
            code="no_active_version",
            field="policy",
        )
    version, digest, shadow_version, shadow_digest = row
    document = ctx.documents.get(conn, name, version, digest)
    shadow = None
    if shadow_version is not None:
        shadow = ctx.documents.get(conn, name, shadow_version, shadow_digest)
    attrs = list(document.groups.attributes)
    if shadow is not None:
        attrs += [a for a in shadow.groups.attributes if a not in attrs]
    return Plan(name, int(version), document, shadow_version, shadow, tuple(attrs))


_LAST_EVENT = select(PolicyState.last_event_id).where(PolicyState.name == bindparam("name"))


def last_switch(conn: Connection, name: str) -> int | None:
    """The id of the policy's last lifecycle event (any switch moves it; so do submissions
    and approvals, which only cost a batch a second decision)."""
    value = conn.scalar(_LAST_EVENT, {"name": name})
    return None if value is None else int(value)
