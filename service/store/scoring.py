"""Scoring's transactions: a single request, a group of them and a batch, each a thin
wrapper around the one decide-and-record pipeline (``service.store.decision_pipeline``).

A request is evaluated against the policy's active version (and its shadow version, if one
is designated; the shadow result is recorded, never returned). Single requests
(:func:`recommend`, :func:`recommend_group`) commit nothing: the caller (the group committer)
commits before anyone is answered. :func:`recommend_batch` owns its transactions: a read
snapshot to decide in, then a short write. Answers are the records' response texts
(:meth:`~service.log.records.DecisionRecord.response_text`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Connection, Engine
from sqlalchemy.exc import IntegrityError

from service.errors import BatchRefused, Conflict, ServiceError, check_batch_size, item_problem
from service.log.records import DecisionRecord
from service.store.db import READ_ONLY
from service.store.decision_pipeline import (
    DecisionPipeline,
    ScoreInput,
    fingerprint,
    look_up,
)
from service.store.recommendations import insert_new_record, insert_records
from service.store.scoring_plans import (
    DocumentCache,
    Plan,
    ScoringContext,
    last_switch,
    resolve_plan,
)
from service.store.switch_lock import hold_for_scoring

__all__ = [
    "DocumentCache",
    "GroupResult",
    "PreparedBatch",
    "ScoreInput",
    "ScoringContext",
    "batch_problems",
    "fingerprint",
    "prepare_batch",
    "recommend",
    "recommend_batch",
    "recommend_group",
    "resolve_plan",
]


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
    fp = fingerprint(req)
    (outcome,) = DecisionPipeline(conn, ctx).decide([req], [fp])
    if isinstance(outcome, DecisionRecord) and insert_new_record(conn, outcome):
        return outcome.response_text(), True
    (stored,) = look_up(conn, [req], [fp])
    if isinstance(stored, DecisionRecord):
        return stored.response_text(), False
    if stored is not None:
        raise stored
    if isinstance(outcome, DecisionRecord):
        # Cannot happen: the conflicting row is visible once we waited on it.
        raise Conflict("request_id is being recorded concurrently; retry", code="concurrent_change")
    raise outcome


GroupResult = tuple[str, bool] | ServiceError
"""One request's outcome in a group: (response JSON, created), or the error it is refused with."""


def recommend_group(
    conn: Connection, reqs: Sequence[ScoreInput], ctx: ScoringContext
) -> list[GroupResult]:
    """Decide independent single requests in one transaction; each succeeds or fails alone.

    The same answers as :func:`recommend` one after another, in fewer statements: one lookup
    of the stored request_ids (which takes the switch lock), one plan lookup per policy and
    one multi-row insert. Requests that share a request_id (a client retrying while its first
    try is still queued) go in later rounds, so a repeat sees the first as stored and gets
    its answer, as it would have one at a time. Nothing is written for a refused request. The
    insert is the last statement: if another process stored one of the request_ids meanwhile
    it raises ``IntegrityError``, and the caller rolls back and decides the requests one by
    one.
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
    pipeline = DecisionPipeline(conn, ctx)
    for members in rounds:
        fps = [fingerprint(reqs[i]) for i in members]
        new: list[int] = []
        for i, stored in zip(
            members, look_up(conn, [reqs[i] for i in members], fps, lock=True), strict=True
        ):
            if stored is None:
                new.append(i)
            elif isinstance(stored, DecisionRecord):
                results[i] = (stored.response_text(), False)
            else:
                results[i] = stored
        at = {i: k for k, i in enumerate(members)}
        records: list[DecisionRecord] = []
        outcomes = pipeline.decide([reqs[i] for i in new], [fps[at[i]] for i in new])
        for i, outcome in zip(new, outcomes, strict=True):
            if isinstance(outcome, DecisionRecord):
                records.append(outcome)
                results[i] = (outcome.response_text(), True)
            else:
                results[i] = outcome
        insert_records(conn, records)
    return [r for r in results if r is not None]


# -- batches ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PreparedBatch:
    """A batch decided against one snapshot of the store, ready to be written."""

    responses: list[str]  # JSON of each item, in input order
    rows: list[DecisionRecord]  # the new records, in input order
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
        if last_switch(conn, name) != prepared.switches[name]:
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
    fps = [fingerprint(r) for r in items]
    responses: list[str | None] = [None] * len(items)
    firsts = list(seen.values())
    for i, stored in zip(
        firsts, look_up(conn, [items[i] for i in firsts], [fps[i] for i in firsts]), strict=True
    ):
        if isinstance(stored, DecisionRecord):
            responses[i] = stored.response_text()
        elif stored is not None:
            refuse(i, stored)  # and decided below, as a new request would be
    new = [i for i in range(len(items)) if responses[i] is None]

    pipeline = DecisionPipeline(conn, ctx)
    switches: dict[str, int | None] = {}
    for name in dict.fromkeys(items[i].policy for i in new):
        # The last event before the plan: a switch in between shows as a change.
        switches[name] = last_switch(conn, name)
        pipeline.plan(name)
    records: list[DecisionRecord] = []
    for i, outcome in zip(
        new, pipeline.decide([items[i] for i in new], [fps[i] for i in new]), strict=True
    ):
        if isinstance(outcome, DecisionRecord):
            records.append(outcome)
            responses[i] = outcome.response_text()
        else:
            refuse(i, outcome)
    if errors:
        raise BatchRefused(errors, len(items))
    versions = {
        name: (plan.version, plan.shadow_version)
        for name, plan in pipeline.plans.items()
        if isinstance(plan, Plan)
    }
    return PreparedBatch([r for r in responses if r is not None], records, versions, switches)
