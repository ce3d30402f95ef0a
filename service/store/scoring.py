"""Scoring: turn requests into recommendations and their decision log records.

A request is evaluated against the policy's active version (and its shadow version, if one
is designated; the shadow result is recorded, never returned). The record and the response
are built from the same values, and a repeated ``request_id`` is answered from the stored
record, so a replayed request gets byte-for-byte the same answer. Single requests
(:func:`recommend`, :func:`recommend_group`) commit nothing: the caller (the group committer)
commits before anyone is answered. :func:`recommend_batch` owns its transactions: a read
snapshot to decide in, then a short write.

The active version is looked up in the transaction that writes the records (once per policy
and group of requests; one indexed query that also finds the shadow): correct across worker
processes and rollbacks without any invalidation. Only the parsed documents are cached, by
content hash, since a stored version never changes. ``issued_at`` is stamped after the
active versions are read, under the switch lock (``service.store.switch_lock``), so every
record's version is the one the history shows active at its ``issued_at``.
"""

from __future__ import annotations

import hashlib
import json
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from functools import lru_cache
from typing import Any, Protocol

from sqlalchemy import Connection, Engine, bindparam, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import aliased

from service.errors import (
    BatchRefused,
    Conflict,
    ServiceError,
    Unprocessable,
    check_batch_size,
    item_problem,
)
from service.log.records import (
    RESPONSE_FIELDS,
    encode_attributes,
    format_timestamp,
    new_record_ids,
    response_text,
)
from service.policy.document import PolicyDocument, resolve_rule_key
from service.policy.errors import PolicyError
from service.policy.rules import check_score, evaluate, evaluate_batch, rule_for
from service.store.db import READ_ONLY
from service.store.models import (
    PolicyState,
    PolicyVersion,
    Recommendation,
    utcnow,
)
from service.store.recommendations import ATTRIBUTES_JSON, insert_new_record, insert_records
from service.store.switch_lock import SCORING_LOCK_SQL, hold_for_scoring

AttributeValue = str | int | float | bool


class ScoreInput(Protocol):
    @property
    def request_id(self) -> str: ...
    @property
    def case_id(self) -> str: ...
    @property
    def policy(self) -> str: ...
    @property
    def score(self) -> float: ...
    @property
    def attributes(self) -> Mapping[str, AttributeValue]: ...


_STORED = [getattr(Recommendation, f) for f in RESPONSE_FIELDS if f != "issued_at"] + [
    Recommendation.issued_at,
    Recommendation.request_fingerprint,
]


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


_Active = aliased(PolicyVersion)
_Shadow = aliased(PolicyVersion)

# Hot-path statements, built once (only their parameters change per request). The policy's
# state row names its active and shadow versions (one primary-key lookup, then two on the
# versions' unique index); an unknown policy has no row, a policy without an active
# version a row whose active version is NULL.
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
# The same lookup as plain SQL for the sqlite3 driver: the hot path skips SQLAlchemy's
# statement and result processing (the four columns are plain integers and text), which
# halves its CPU on SQLite. On PostgreSQL the driver-level form measured slower than the
# compiled statement (psycopg), so it keeps _PLAN_QUERY. Keep the two equal.
_PLAN_SQL_SQLITE = (
    "SELECT p.active_version, v.content_hash, p.shadow_version, s.content_hash "
    "FROM policy_state AS p "
    "LEFT OUTER JOIN policy_versions AS v ON v.name = p.name AND v.version = p.active_version "
    "LEFT OUTER JOIN policy_versions AS s ON s.name = p.name AND s.version = p.shadow_version "
    "WHERE p.name = ?"
)
_EXISTING_QUERY = select(*_STORED).where(Recommendation.request_id == bindparam("request_id"))
_EXISTING_MANY = select(*_STORED).where(
    Recommendation.request_id.in_(bindparam("ids", expanding=True))
)
_STORED_IDS_SQL: dict[tuple[str, int], str] = {}


def _lock_and_find_stored(conn: Connection, ids: list[str]) -> set[str]:
    """Take the switch lock for scoring and say which of ``ids`` are stored, in one plain
    statement on the driver (most groups find none, so the full typed lookup runs only for
    the ones found). On PostgreSQL the lock rides on this statement (one round trip for
    both); the statements after it read with snapshots taken after the lock was granted."""
    dialect = conn.dialect
    key = (dialect.name, len(ids))
    sql = _STORED_IDS_SQL.get(key)
    if sql is None:
        mark = "?" if dialect.paramstyle == "qmark" else "%s"
        sql = (
            "SELECT request_id FROM recommendations WHERE request_id IN "
            f"({', '.join([mark] * len(ids))})"
        )
        if dialect.name == "postgresql":
            sql += f" UNION ALL SELECT NULL FROM ({SCORING_LOCK_SQL}) AS switch_lock"
        _STORED_IDS_SQL[key] = sql
    found = {row[0] for row in conn.exec_driver_sql(sql, tuple(ids))}
    found.discard(None)
    return found


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


def fingerprint(req: ScoreInput) -> bytes:
    """A digest of the request body (the first 16 bytes of SHA-256), to tell a replay from
    a reuse of its request_id.

    Only ever compared with itself, so it need not be canonical JSON: ``repr`` of a tuple of
    str, float and sorted (name, value) pairs is deterministic and keeps 1, 1.0 and True apart.
    """
    body = (
        req.request_id,
        req.case_id,
        req.policy,
        float(req.score),
        sorted(req.attributes.items()),
    )
    return hashlib.sha256(repr(body).encode("utf-8")).digest()[:16]


def response_of(values: Any) -> str:
    """The API response (JSON text) for a stored record: a row or a mapping of its values.

    The same bytes as the answer first given for it (``response_text``), so a replay is
    byte-for-byte the original."""
    get = values.__getitem__ if isinstance(values, Mapping) else values._mapping.__getitem__
    out = {f: get(f) for f in RESPONSE_FIELDS}
    out["issued_at"] = format_timestamp(out["issued_at"])
    out["action"] = bool(out["action"])
    return _RESPONSE_JSON.encode(out)


_RESPONSE_JSON = json.JSONEncoder(separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def _replay(row: Any, req: ScoreInput, fp: bytes) -> str:
    if bytes(row.request_fingerprint) != fp:
        raise Conflict(
            f"request_id {req.request_id!r} was already used with a different body; use a new "
            "request_id for a new request",
            code="idempotency_conflict",
            field="request_id",
        )
    return response_of(row)


def find_existing(conn: Connection, req: ScoreInput) -> str | None:
    """The stored answer for this request_id (None if new); 409 if the body differs."""
    row = conn.execute(_EXISTING_QUERY, {"request_id": req.request_id}).first()
    return None if row is None else _replay(row, req, fingerprint(req))


def _stored_attributes(plan: Plan, attributes: Mapping[str, AttributeValue]) -> dict[str, Any]:
    # Keep only what the policy needs (data minimisation); the fingerprint covers the rest.
    return {a: attributes[a] for a in plan.stored_attributes if a in attributes}


@lru_cache(maxsize=4096)
def _attributes_json(items: tuple[tuple[str, type, Any], ...]) -> str:
    # Keyed with the value's type: 1, 1.0 and True are equal as keys but not as JSON.
    return encode_attributes({k: v for k, _, v in items})


def _shadow_one(plan: Plan, req: ScoreInput, secret: bytes) -> tuple[float | None, bool | None]:
    if plan.shadow is None or plan.shadow_version is None:
        return None, None
    try:
        d = evaluate(
            plan.shadow, plan.shadow_version, req.score, dict(req.attributes), req.case_id, secret
        )
    except PolicyError:
        return None, None  # the shadow could not decide; recorded as such
    return d.probability, d.action


def _row(
    plan: Plan,
    req: ScoreInput,
    fp: bytes,
    decision: tuple[str, str, float, float, bool],
    shadow: tuple[float | None, bool | None],
    issued_at: tuple[datetime, str],
    record_id: str,
) -> tuple[dict[str, Any], str]:
    """(row to insert, response JSON) for one decision, both from the same values."""
    group, rule, probability, draw, action = decision
    attributes = _stored_attributes(plan, req.attributes)
    attributes_json = _attributes_json(tuple((k, type(v), v) for k, v in attributes.items()))
    payload = {
        "recommendation_id": record_id,
        "request_id": req.request_id,
        "case_id": req.case_id,
        "policy": plan.name,
        "version": plan.version,
        "score": float(req.score),
        "attributes": attributes,
        "group": group,
        "rule": rule,
        "probability": probability,
        "draw": draw,
        "action": action,
        "action_label": plan.document.action_label if action else plan.document.no_action_label,
        "issued_at": issued_at[1],
        "shadow_version": plan.shadow_version,
        "shadow_probability": shadow[0],
        "shadow_action": shadow[1],
    }
    response = response_text(payload)
    payload["issued_at"] = issued_at[0]
    payload["request_fingerprint"] = fp
    payload[ATTRIBUTES_JSON] = attributes_json
    return payload, response


def _now() -> tuple[datetime, str]:
    now = utcnow()
    return now, format_timestamp(now)


def recommend(conn: Connection, req: ScoreInput, ctx: ScoringContext) -> tuple[str, bool]:
    """(response JSON, created). A replay of a stored request returns it with created=False.

    New requests, the common case, cost two statements: the plan lookup and an insert that
    skips a request_id already stored (``ON CONFLICT DO NOTHING``, which also settles two
    concurrent requests with one request_id without an error). Only when nothing was
    inserted, or the request cannot be decided, is the stored record looked up: a replay
    gets its stored answer even after the policy moved on, a reuse with another body a 409.
    The single write is the last statement, so a failure leaves nothing to undo.
    """
    hold_for_scoring(conn)
    try:
        plan = resolve_plan(conn, req.policy, ctx)
        d = evaluate(
            plan.document, plan.version, req.score, dict(req.attributes), req.case_id, ctx.secret
        )
    except ServiceError:
        existing = find_existing(conn, req)
        if existing is not None:
            return existing, False
        raise
    decision = (d.group, d.rule, float(d.probability), float(d.draw), bool(d.action))
    shadow = _shadow_one(plan, req, ctx.secret)
    (record_id,) = new_record_ids(1)
    row, response = _row(plan, req, fingerprint(req), decision, shadow, _now(), record_id)
    if insert_new_record(conn, row):
        return response, True
    existing = find_existing(conn, req)
    if existing is None:  # cannot happen: the conflicting row is visible once we waited on it
        raise Conflict("request_id is being recorded concurrently; retry", code="concurrent_change")
    return existing, False


GroupResult = tuple[str, bool] | ServiceError
"""One request's outcome in a group: (response JSON, created), or the error it is refused with."""


def recommend_group(
    conn: Connection, reqs: Sequence[ScoreInput], ctx: ScoringContext
) -> list[GroupResult]:
    """Decide independent single requests in one transaction; each succeeds or fails alone.

    The same answers as :func:`recommend` one after another, in fewer statements: one lookup
    of the stored request_ids, one plan lookup per policy and one multi-row insert. Requests
    that share a request_id (a client retrying while its first try is still queued) go in
    later rounds, so a repeat sees the first as stored and gets its answer, as it would
    have one at a time. Nothing is written for a refused request. The insert is the last
    statement: if another process stored one of the request_ids meanwhile it raises
    ``IntegrityError``, and the caller rolls back and decides the requests one by one.
    The switch lock is taken by the first statement (:func:`_lock_and_find_stored`).
    """
    results: list[GroupResult | None] = [None] * len(reqs)
    rounds: list[list[int]] = []
    seen: dict[str, int] = {}
    for i, req in enumerate(reqs):
        n = seen.get(req.request_id, 0)
        seen[req.request_id] = n + 1
        if n == len(rounds):
            rounds.append([])
        rounds[n].append(i)
    plans: dict[str, Plan | ServiceError] = {}
    for members in rounds:
        _decide_round(conn, reqs, members, plans, results, ctx)
    return [r for r in results if r is not None]


def _decide_round(
    conn: Connection,
    reqs: Sequence[ScoreInput],
    members: list[int],
    plans: dict[str, Plan | ServiceError],
    results: list[GroupResult | None],
    ctx: ScoringContext,
) -> None:
    fingerprints = {i: fingerprint(reqs[i]) for i in members}
    by_id = {reqs[i].request_id: i for i in members}
    found = _lock_and_find_stored(conn, list(by_id))
    stored_rows = conn.execute(_EXISTING_MANY, {"ids": list(found)}) if found else ()
    for stored in stored_rows:
        i = by_id[stored.request_id]
        try:
            results[i] = (_replay(stored, reqs[i], fingerprints[i]), False)
        except Conflict as exc:
            results[i] = exc
    for i in members:
        name = reqs[i].policy
        if results[i] is None and name not in plans:
            try:
                plans[name] = resolve_plan(conn, name, ctx)
            except ServiceError as exc:
                plans[name] = exc
    # Stamped after the active versions were read (see the module's docstring).
    issued_at = _now()
    record_ids = iter(new_record_ids(len(members)))
    rows: list[dict[str, Any]] = []
    for i in members:
        if results[i] is not None:
            continue
        req = reqs[i]
        plan = plans[req.policy]
        if isinstance(plan, ServiceError):
            results[i] = plan
            continue
        try:
            d = evaluate(
                plan.document,
                plan.version,
                req.score,
                dict(req.attributes),
                req.case_id,
                ctx.secret,
            )
        except PolicyError as exc:
            results[i] = exc
            continue
        decision = (d.group, d.rule, float(d.probability), float(d.draw), bool(d.action))
        shadow = _shadow_one(plan, req, ctx.secret)
        row, response = _row(
            plan, req, fingerprints[i], decision, shadow, issued_at, next(record_ids)
        )
        rows.append(row)
        results[i] = (response, True)
    insert_records(conn, rows)


# -- batches ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PreparedBatch:
    """A batch decided against one snapshot of the store, ready to be written."""

    responses: list[str]  # JSON of each item, in input order
    rows: list[dict[str, Any]]  # the new records
    versions: dict[str, tuple[int, int | None]]  # policy -> (version, shadow) decided with
    switches: dict[str, int | None]  # policy -> id of its last event, read before it


def recommend_batch(
    engine: Engine, items: Sequence[ScoreInput], ctx: ScoringContext
) -> tuple[list[str], int]:
    """(response JSON of each item in input order, number newly written), committed.

    All or nothing: any bad item -> 422 and nothing written. The batch is decided in a
    read-only transaction (on SQLite a WAL snapshot: no write lock while thousands of
    decisions are computed, so single requests are not held up), then written in a short
    write transaction that first checks, under the switch lock, that no switch of the
    active or shadow version happened since it was decided (the policy's last event is the
    one read before deciding); the unique index on request_id refuses one stored
    meanwhile. If either moved, the batch is decided again inside the write transaction, so
    every record names the version the history shows active at its ``issued_at`` and no
    request_id is stored twice.
    """
    with engine.connect().execution_options(**{READ_ONLY: True}) as conn, conn.begin():
        prepared = prepare_batch(conn, items, ctx)
    with engine.connect() as conn:
        try:
            with conn.begin():
                hold_for_scoring(conn)
                if not _same_versions(conn, prepared, ctx):
                    prepared = prepare_batch(conn, items, ctx)
                insert_records(conn, prepared.rows)
        except IntegrityError:
            # One of the request_ids was stored meanwhile (the unique index says so): decide
            # again inside the write transaction, which sees it as stored.
            with conn.begin():
                hold_for_scoring(conn)
                prepared = prepare_batch(conn, items, ctx)
                insert_records(conn, prepared.rows)
    return prepared.responses, len(prepared.rows)


_LAST_EVENT = select(PolicyState.last_event_id).where(PolicyState.name == bindparam("name"))


def _last_switch(conn: Connection, name: str) -> int | None:
    """The id of the policy's last lifecycle event (any switch moves it; so do submissions
    and approvals, which only cost a batch a second decision)."""
    value = conn.scalar(_LAST_EVENT, {"name": name})
    return None if value is None else int(value)


def batch_problems(
    engine: Engine, items: Sequence[ScoreInput], ctx: ScoringContext, positions: Sequence[int]
) -> list[dict[str, Any]]:
    """What :func:`prepare_batch` refuses among ``items`` (the valid part of a batch whose other
    items were refused already), decided on a read snapshot; writes nothing."""
    if not items:
        return []
    with engine.connect().execution_options(**{READ_ONLY: True}) as conn, conn.begin():
        try:
            prepare_batch(conn, items, ctx, positions)
        except BatchRefused as exc:
            return exc.details
    return []


def _same_versions(conn: Connection, prepared: PreparedBatch, ctx: ScoringContext) -> bool:
    """No switch since the batch was decided: the same versions, and the same last switch
    (a switch away and back again leaves the versions equal but moves the history on)."""
    for name, versions in prepared.versions.items():
        if _last_switch(conn, name) != prepared.switches[name]:
            return False
        try:
            plan = resolve_plan(conn, name, ctx)
        except ServiceError:
            return False
        if (plan.version, plan.shadow_version) != versions:
            return False
    return True


def prepare_batch(
    conn: Connection,
    items: Sequence[ScoreInput],
    ctx: ScoringContext,
    positions: Sequence[int] | None = None,
) -> PreparedBatch:
    """Decide a batch against what ``conn`` sees, writing nothing; 422 if any item is bad.

    ``positions``: each item's index in the request, when ``items`` are the valid part of a
    larger batch (errors name the request's indices).
    """
    check_batch_size(len(items), ctx.max_batch_items)
    at = positions if positions is not None else range(len(items))
    errors: list[dict[str, Any]] = []

    def refuse(i: int, exc: ServiceError) -> None:
        errors.append(item_problem(at[i], exc))

    seen: dict[str, int] = {}
    for i, req in enumerate(items):
        if req.request_id in seen:
            first = at[seen[req.request_id]]
            refuse(
                i,
                Conflict(
                    f"request_id {req.request_id!r} is also used by items.{first}",
                    code="duplicate_request_id",
                    field="request_id",
                ),
            )
        else:
            seen[req.request_id] = i
    fingerprints = [fingerprint(r) for r in items]
    responses: list[str | None] = [None] * len(items)
    ids = list(seen)
    for start in range(0, len(ids), 1000):
        chunk = ids[start : start + 1000]
        for row in conn.execute(_EXISTING_MANY, {"ids": chunk}):
            i = seen[row.request_id]
            try:
                responses[i] = _replay(row, items[i], fingerprints[i])
            except Conflict as exc:
                refuse(i, exc)

    new_by_policy: dict[str, list[int]] = {}
    for i, req in enumerate(items):
        if responses[i] is None:
            new_by_policy.setdefault(req.policy, []).append(i)

    plans: dict[str, Plan] = {}
    switches: dict[str, int | None] = {}
    groups: dict[int, str] = {}
    for name, members in new_by_policy.items():
        try:
            # The last event before the plan: a switch in between shows as a change.
            switches[name] = _last_switch(conn, name)
            plans[name] = plan = resolve_plan(conn, name, ctx)
        except ServiceError as exc:
            for i in members:
                refuse(i, exc)
            continue
        rule_ok: dict[str, bool] = {}
        for i in members:
            req = items[i]
            try:
                check_score(plan.document, req.score)
                g = plan.document.group_key(req.attributes)
                if g not in rule_ok:
                    rule_ok[g] = resolve_rule_key(plan.document, g) is not None
                if not rule_ok[g]:
                    rule_for(plan.document, g)  # raises the engine's UnknownGroup
                groups[i] = g
            except PolicyError as exc:
                refuse(i, exc)
    if errors:
        raise BatchRefused(errors, len(items))

    issued_at = _now()
    rows_out: list[dict[str, Any]] = []
    for name, idx in new_by_policy.items():
        new_rows, outs = _evaluate_policy_rows(
            plans[name], idx, items, groups, fingerprints, issued_at, ctx
        )
        rows_out.extend(new_rows)
        for i, out in zip(idx, outs, strict=True):
            responses[i] = out
    versions = {name: (plan.version, plan.shadow_version) for name, plan in plans.items()}
    return PreparedBatch([r for r in responses if r is not None], rows_out, versions, switches)


def _evaluate_policy_rows(
    plan: Plan,
    idx: list[int],
    items: Sequence[ScoreInput],
    groups: dict[int, str],
    fingerprints: list[bytes],
    issued_at: tuple[datetime, str],
    ctx: ScoringContext,
) -> tuple[list[dict[str, Any]], list[str]]:
    reqs = [items[i] for i in idx]
    scores = [float(r.score) for r in reqs]
    case_ids = [r.case_id for r in reqs]
    main = evaluate_batch(
        plan.document, plan.version, scores, [groups[i] for i in idx], case_ids, ctx.secret
    )
    shadow_p: list[float | None] = [None] * len(idx)
    shadow_a: list[bool | None] = [None] * len(idx)
    if plan.shadow is not None and plan.shadow_version is not None:
        ok: list[int] = []
        sgroups: list[str] = []
        for j, r in enumerate(reqs):
            try:
                g = plan.shadow.group_key(r.attributes)
            except PolicyError:
                continue
            if (
                resolve_rule_key(plan.shadow, g) is not None
                and plan.shadow.score_range[0] <= r.score <= plan.shadow.score_range[1]
            ):
                ok.append(j)
                sgroups.append(g)
        if ok:
            sb = evaluate_batch(
                plan.shadow,
                plan.shadow_version,
                [scores[j] for j in ok],
                sgroups,
                [case_ids[j] for j in ok],
                ctx.secret,
            )
            for k, j in enumerate(ok):
                shadow_p[j] = float(sb.probability[k])
                shadow_a[j] = bool(sb.action[k])
    probs = main.probability.tolist()
    draws = main.draw.tolist()
    acts = main.action.tolist()
    record_ids = new_record_ids(len(reqs))
    rows: list[dict[str, Any]] = []
    outs: list[str] = []
    for j, r in enumerate(reqs):
        decision = (main.group[j], main.rule[j], probs[j], draws[j], bool(acts[j]))
        shadow = (shadow_p[j], shadow_a[j])
        row, out = _row(plan, r, fingerprints[idx[j]], decision, shadow, issued_at, record_ids[j])
        rows.append(row)
        outs.append(out)
    return rows, outs
