"""The one decide-and-record pipeline every scoring path runs: plan resolution, the replay
look-up, the decision, the shadow evaluation and the records to write.

The transaction wrappers in ``service.store.scoring`` (a single request, a group of them, a
batch) call it and only differ in how they write and what they do with a refusal. A new
request becomes a :class:`~service.log.records.DecisionRecord` here, in one place
(:func:`_record`); its row, its canonical bytes and its response text are derived from it.
A repeated ``request_id`` is answered from its stored record, so a replayed request gets
byte-for-byte the same answer. ``issued_at`` is stamped after the active versions are read,
under the switch lock (``service.store.switch_lock``, taken by the wrappers), so every
record's version is the one the history shows active at its ``issued_at``.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from datetime import datetime
from typing import Protocol

from sqlalchemy import Connection

from service.errors import Conflict, ServiceError
from service.log.records import DecisionRecord, new_record_ids
from service.policy.document import PolicyDocument
from service.policy.errors import PolicyError
from service.policy.rules import Decision, check_score, evaluate, evaluate_batch, rule_for
from service.store.models import utcnow
from service.store.recommendations import stored_records
from service.store.scoring_plans import Plan, ScoringContext, resolve_plan

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


Outcome = DecisionRecord | ServiceError
"""A new request's outcome: its record, or the error it is refused with."""


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


def look_up(
    conn: Connection, reqs: Sequence[ScoreInput], fingerprints: Sequence[bytes], lock: bool = False
) -> list[DecisionRecord | Conflict | None]:
    """The replay look-up: for each request (distinct request_ids), its stored record, a 409
    if its request_id was stored with another body, or None if it is new. ``lock``: take
    the switch lock for scoring in the same statement."""
    stored = stored_records(conn, [r.request_id for r in reqs], lock)
    if not stored:
        return [None] * len(reqs)
    return [
        None if (rec := stored.get(req.request_id)) is None else _replay(rec, req, fp)
        for req, fp in zip(reqs, fingerprints, strict=True)
    ]


def _replay(record: DecisionRecord, req: ScoreInput, fp: bytes) -> DecisionRecord | Conflict:
    if record.request_fingerprint != fp:
        return Conflict(
            f"request_id {req.request_id!r} was already used with a different body; use a new "
            "request_id for a new request",
            code="idempotency_conflict",
            field="request_id",
        )
    return record


class DecisionPipeline:
    """Decisions in one transaction: each policy's plan is read once (the first time one of
    its requests is decided), then every new request is decided against it."""

    __slots__ = ("conn", "ctx", "plans")

    def __init__(self, conn: Connection, ctx: ScoringContext) -> None:
        self.conn = conn
        self.ctx = ctx
        self.plans: dict[str, Plan | ServiceError] = {}

    def plan(self, name: str) -> Plan | ServiceError:
        plan = self.plans.get(name)
        if plan is None:
            try:
                plan = resolve_plan(self.conn, name, self.ctx)
            except ServiceError as exc:
                plan = exc
            self.plans[name] = plan
        return plan

    def decide(self, reqs: Sequence[ScoreInput], fingerprints: Sequence[bytes]) -> list[Outcome]:
        """Decide new requests (none of them stored) against their policies' active versions,
        with the shadow version's answer beside; writes nothing."""
        by_policy: dict[str, list[int]] = {}
        for i, req in enumerate(reqs):
            by_policy.setdefault(req.policy, []).append(i)
        plans = {name: self.plan(name) for name in by_policy}
        issued_at = utcnow()  # after the active versions were read (see the module's docstring)
        record_ids = iter(new_record_ids(len(reqs)))
        out: list[Outcome | None] = [None] * len(reqs)
        secret = self.ctx.secret
        for name, members in by_policy.items():
            plan = plans[name]
            if isinstance(plan, ServiceError):
                for i in members:
                    out[i] = plan
                continue
            group = [reqs[i] for i in members]
            main = evaluate_requests(plan.document, plan.version, group, secret)
            shadow: list[Decision | PolicyError] | None = None
            if plan.shadow is not None and plan.shadow_version is not None:
                shadow = evaluate_requests(plan.shadow, plan.shadow_version, group, secret)
            for j, i in enumerate(members):
                decision = main[j]
                if isinstance(decision, PolicyError):
                    out[i] = decision
                    continue
                s = None if shadow is None else shadow[j]
                out[i] = _record(
                    plan,
                    reqs[i],
                    fingerprints[i],
                    decision,
                    None if isinstance(s, PolicyError) else s,  # the shadow could not decide
                    issued_at,
                    next(record_ids),
                )
        return [o for o in out if o is not None]


def _record(
    plan: Plan,
    req: ScoreInput,
    fp: bytes,
    d: Decision,
    shadow: Decision | None,
    issued_at: datetime,
    record_id: str,
) -> DecisionRecord:
    """The record of a new decision. It keeps only the attributes the policy groups by
    (data minimisation); the fingerprint covers the rest."""
    attributes = req.attributes
    return DecisionRecord(
        record_id,
        req.request_id,
        req.case_id,
        plan.name,
        plan.version,
        float(req.score),
        {a: attributes[a] for a in plan.stored_attributes if a in attributes},
        d.group,
        d.rule,
        float(d.probability),
        float(d.draw),
        bool(d.action),
        d.action_label,
        issued_at,
        plan.shadow_version,
        None if shadow is None else float(shadow.probability),
        None if shadow is None else bool(shadow.action),
        fp,
    )


VECTORISED_FROM = 32
"""From this many requests of one version on, they are evaluated in one numpy pass."""


def evaluate_requests(
    document: PolicyDocument, version: int, reqs: Sequence[ScoreInput], secret: bytes
) -> list[Decision | PolicyError]:
    """Each request's decision under one version, or the engine's refusal. A few requests are
    evaluated one by one; many, checked one by one and then evaluated in one pass
    (:func:`~service.policy.rules.evaluate_batch`, bit-identical to :func:`evaluate`)."""
    if len(reqs) < VECTORISED_FROM:
        out: list[Decision | PolicyError] = []
        for r in reqs:
            try:
                out.append(
                    evaluate(document, version, r.score, dict(r.attributes), r.case_id, secret)
                )
            except PolicyError as exc:
                out.append(exc)
        return out
    results: list[Decision | PolicyError | None] = [None] * len(reqs)
    ok: list[int] = []
    groups: list[str] = []
    known: dict[str, PolicyError | None] = {}  # a group's rule lookup, once per group
    for j, r in enumerate(reqs):
        try:  # the checks of evaluate, in its order
            check_score(document, r.score)
            g = document.group_key(r.attributes)
            if g not in known:
                try:
                    rule_for(document, g)
                    known[g] = None
                except PolicyError as exc:
                    known[g] = exc
            refusal = known[g]
            if refusal is not None:
                raise refusal
        except PolicyError as exc:
            results[j] = exc
            continue
        ok.append(j)
        groups.append(g)
    if ok:
        b = evaluate_batch(
            document,
            version,
            [float(reqs[j].score) for j in ok],
            groups,
            [reqs[j].case_id for j in ok],
            secret,
        )
        yes, no = document.action_label, document.no_action_label
        for j, g, rule, p, u, a in zip(
            ok,
            groups,
            b.rule,
            b.probability.tolist(),
            b.draw.tolist(),
            b.action.tolist(),
            strict=True,
        ):
            results[j] = Decision(bool(a), yes if a else no, p, u, g, rule)
    return [r for r in results if r is not None]
