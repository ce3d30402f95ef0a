"""CPU per single recommendation of the database work alone, two ways, in one process.

1. through SQLAlchemy: a session, ``keys.authenticate`` in its own transaction, then
   ``scoring.recommend`` and a commit, one request per transaction (the route's path before
   the group committer, which now shares one transaction among a group of requests; the
   committer's own cost is in ``store_hot_path.py``);
2. the same statements on a plain ``sqlite3`` connection: key lookup, idempotency lookup and
   active-version lookup in one read transaction, the same evaluation and record hash, then one
   INSERT and COMMIT.

It shows how much of a request's CPU is SQLAlchemy's per-statement and per-transaction work
rather than SQLite's (see docs/benchmarks.md). SQLite with synchronous=NORMAL so the disk does
not blur the CPU figures. Run: ``.venv/bin/python benchmarks/bench_db_layer.py``.
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
import sys
import tempfile
import time
import uuid
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_scoring import bodies, prepare

from service.api.recommendation_schemas import RecommendationRequest
from service.demo.policy import demo_policy
from service.log.records import record_leaf_hash
from service.policy.document import PolicyDocument
from service.policy.rules import evaluate
from service.settings import Settings
from service.store import keys, lifecycle, scoring
from service.store.db import create_db_engine, create_session_factory
from service.store.scoring import DocumentCache, ScoringContext, fingerprint

COLUMNS = [
    "recommendation_id",
    "request_id",
    "request_fingerprint",
    "case_id",
    "policy",
    "version",
    "score",
    "attributes",
    "group",
    "rule",
    "probability",
    "draw",
    "action",
    "action_label",
    "issued_at",
    "shadow_version",
    "shadow_probability",
    "shadow_action",
    "record_hash",
]
INSERT = (
    "INSERT INTO recommendations ("
    + ",".join(f'"{c}"' for c in COLUMNS)
    + ") VALUES ("
    + ",".join("?" * len(COLUMNS))
    + ")"
)


def main() -> int:
    with tempfile.TemporaryDirectory(prefix="evenhand-dblayer-") as tmp:
        path = Path(tmp) / "bench.db"
        url = f"sqlite:///{path}"
        tokens = prepare(url)
        engine = create_db_engine(Settings(database_url=url, sqlite_synchronous="NORMAL"))
        factory = create_session_factory(engine)
        doc = PolicyDocument.model_validate(demo_policy())
        with factory() as s:
            author = keys.admin_actor(s, tokens["author"])
            lifecycle.submit(s, doc.name, doc, author)
            lifecycle.approve(s, doc.name, 1, keys.admin_actor(s, tokens["reviewer"]))
            lifecycle.activate(s, doc.name, 1, author, "benchmark", expected_current=None)
            s.commit()
        ctx = ScoringContext(b"k" * 32, DocumentCache(), 10_000)
        token = tokens["scoring"]

        def via_sqlalchemy(reqs: list[RecommendationRequest]) -> None:
            for r in reqs:
                with factory() as s:
                    keys.authenticate(s, token)
                    s.commit()
                    scoring.recommend(s.connection(), r, ctx)
                    s.commit()

        con = sqlite3.connect(path, isolation_level=None)
        con.execute("PRAGMA synchronous=NORMAL")
        token_hash = hashlib.sha256(token.encode()).hexdigest()

        def via_sqlite3(reqs: list[RecommendationRequest]) -> None:
            for r in reqs:
                con.execute("BEGIN")
                con.execute(
                    "SELECT k.id, k.name, k.role FROM api_keys AS k WHERE k.token_hash = ? "
                    "AND NOT EXISTS (SELECT 1 FROM key_events AS e "
                    "WHERE e.key_id = k.id AND e.action = 'revoke')",
                    (token_hash,),
                ).fetchone()
                con.execute(
                    "SELECT request_fingerprint FROM recommendations WHERE request_id = ?",
                    (r.request_id,),
                ).fetchone()
                con.execute(
                    "SELECT p.active_version, v.content_hash FROM policy_state AS p "
                    "JOIN policy_versions AS v ON v.name = p.name AND v.version = p.active_version "
                    "WHERE p.name = ?",
                    (r.policy,),
                ).fetchone()
                con.execute("COMMIT")
                d = evaluate(doc, 1, r.score, dict(r.attributes), r.case_id, ctx.secret)
                now = datetime.now(UTC)
                values: dict[str, Any] = {
                    "recommendation_id": str(uuid.uuid4()),
                    "request_id": r.request_id,
                    "request_fingerprint": fingerprint(r),
                    "case_id": r.case_id,
                    "policy": r.policy,
                    "version": 1,
                    "score": r.score,
                    "attributes": dict(r.attributes),
                    "group": d.group,
                    "rule": d.rule,
                    "probability": d.probability,
                    "draw": d.draw,
                    "action": d.action,
                    "action_label": d.action_label,
                    "issued_at": now,
                    "shadow_version": None,
                    "shadow_probability": None,
                    "shadow_action": None,
                }
                values["record_hash"] = record_leaf_hash(values)
                values["attributes"] = json.dumps(values["attributes"])
                values["issued_at"] = now.replace(tzinfo=None).isoformat(sep=" ")
                con.execute("BEGIN IMMEDIATE")
                con.execute(INSERT, [values[c] for c in COLUMNS])
                con.execute("COMMIT")

        runs: list[tuple[str, Callable[[list[RecommendationRequest]], None]]] = [
            ("SQLAlchemy session (service path)", via_sqlalchemy),
            ("plain sqlite3, same statements", via_sqlite3),
        ]
        print("CPU per request, 1,000 requests each, two rounds:", file=sys.stderr)
        for round_no in (1, 2):
            for label, run in runs:
                reqs = [
                    RecommendationRequest.model_validate(b)
                    for b in bodies(1000, f"r{round_no}-{uuid.uuid4().hex[:6]}", doc.name)
                ]
                start = time.process_time()
                run(reqs)
                per_request_ms = (time.process_time() - start) / len(reqs) * 1000
                print(f"  round {round_no}  {label:<36} {per_request_ms:.3f} ms", file=sys.stderr)
        con.close()
        engine.dispose()
    return 0


if __name__ == "__main__":
    sys.exit(main())
