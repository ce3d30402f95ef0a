"""Audit job benchmark: one month of 1,000,000 and 4,000,000 recommendations with outcomes.

Targets (issue 4): the audit of 1,000,000 recommendations <= 2 s on SQLite and <= 1 s on
PostgreSQL; 4,000,000 within 4.5 x the 1,000,000 time; peak memory of the job <= 300 MB.

Rows are bulk-loaded with one INSERT ... SELECT per table, generated inside the database (a
recursive CTE on SQLite, generate_series on PostgreSQL): 9 groups (3 communities x 3
languages), 90% of rows with an outcome, half with a shadow decision, 10% with a
final decision. Each timed audit runs in a fresh subprocess that reports the wall time of
``run_audit`` and its own peak RSS (``resource.getrusage``); the best of five runs counts.
The job's own CPU time is reported beside (on SQLite all the work is in the job's process;
on PostgreSQL most of it is in the server's).

    .venv/bin/python benchmarks/bench_audit.py [--sizes 1000000,4000000]
        [--backends sqlite,postgresql] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path
from typing import Any

from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.policy.document import PolicyDocument, content_hash, document_json  # noqa: E402
from service.store.migrate import upgrade  # noqa: E402

POLICY = "fernhollow-bench"
MONTH = "2026-10"
COMMUNITIES = ("quarry-hill", "millbrook", "saltmarsh")
LANGUAGES = ("en", "es", "other")
COPIED = ", ".join(
    (
        "policy",
        "version",
        '"group"',
        "shadow_version",
        "issued_at",
        "action",
        "probability",
        "shadow_action",
        "score",
    )
)
PG_SERVER = os.environ.get(
    "EVENHAND_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)


def bench_document(version_cut: float) -> dict[str, Any]:
    known = [f"{c}|{lang}" for c in COMMUNITIES for lang in LANGUAGES]
    doc = PolicyDocument.model_validate(
        {
            "name": POLICY,
            "score_meaning": "P(readmission within 30 days)",
            "action_label": "offer nurse follow-up",
            "no_action_label": "standard discharge",
            "favourable": "action",
            "costs": {"false_positive": 1, "false_negative": 4},
            "groups": {
                "attributes": ["community", "language"],
                "known": known,
                "fallback": {"use_parent": True},
            },
            "rules": {
                c: {"steps": [{"from": version_cut, "probability": 1.0}]} for c in COMMUNITIES
            },
            "targets": {
                "criterion": "equal-opportunity",
                "tolerance": 0.05,
                "groups": {k: {"action_rate": 0.3, "tpr": 0.7, "fpr": 0.2} for k in known},
            },
        }
    )
    return document_json(doc)


def _group_sql(index: str) -> str:
    keys = [f"{c}|{lang}" for c in COMMUNITIES for lang in LANGUAGES]
    whens = " ".join(f"WHEN {i} THEN '{k}'" for i, k in enumerate(keys))
    return f"CASE ({index}) % 9 {whens} END"


def load(url: str, n: int) -> float:
    """Migrate and fill the database; returns the seconds the load took."""
    started = time.perf_counter()
    upgrade(url)
    engine = create_engine(url)
    sqlite = engine.dialect.name == "sqlite"
    with engine.begin() as conn:
        for version, cut in ((1, 0.2), (2, 0.25)):
            doc = bench_document(cut)
            conn.execute(
                text(
                    "INSERT INTO policy_versions (name, version, document, content_hash, "
                    "author, created_at) VALUES (:n, :v, :d, :h, 'bench', :t)"
                ),
                {
                    "n": POLICY,
                    "v": version,
                    "d": json.dumps(doc),
                    "h": content_hash(PolicyDocument.model_validate(doc)),
                    "t": "2026-09-01 00:00:00.000000" if sqlite else "2026-09-01T00:00:00Z",
                },
            )
        if sqlite:
            conn.execute(text("PRAGMA journal_mode=WAL"))
            seq = (
                "WITH RECURSIVE seq(i) AS (SELECT 1 UNION ALL SELECT i + 1 FROM seq "
                f"WHERE i < {n}), base AS (SELECT i, abs(random() % 1000000) / 1000000.0 AS s "
                "FROM seq)"
            )
            # 2,678,400 s in October; spread the rows evenly over the month.
            issued = (
                "strftime('%Y-%m-%d %H:%M:%S', 1790812800 + (i - 1) * 2678400 / "
                f"{n}, 'unixepoch') || '.000000'"
            )
            conn.execute(
                text(
                    f"{seq} INSERT INTO recommendations (id, recommendation_id, request_id, "
                    "request_fingerprint, case_id, policy, version, score, attributes, "
                    '"group", rule, probability, draw, action, action_label, issued_at, '
                    "shadow_version, shadow_probability, shadow_action, record_hash) "
                    "SELECT i, printf('r%035d', i), printf('q%d', i), 'f', printf('c%d', i), "
                    f"'{POLICY}', 1, s, '{{}}', {_group_sql('i')}, 'r', "
                    "CASE WHEN s >= 0.2 THEN 1.0 ELSE 0.0 END, 0.5, s >= 0.2, 'offer', "
                    f"{issued}, CASE WHEN i % 2 = 0 THEN 2 END, "
                    "CASE WHEN i % 2 = 0 THEN (CASE WHEN s >= 0.25 THEN 1.0 ELSE 0.0 END) END, "
                    "CASE WHEN i % 2 = 0 THEN s >= 0.25 END, 'h' FROM base"
                )
            )
            conn.execute(
                text(
                    "INSERT INTO outcomes (recommendation_pk, outcome, observed_at, source, "
                    f"recorded_at, corrections, {COPIED}) SELECT id, "
                    "(abs(random() % 1000000) / 1000000.0) < score, issued_at, 'bench', "
                    f"issued_at, 0, {COPIED} FROM recommendations WHERE id % 10 <> 0"
                )
            )
            conn.execute(
                text(
                    "INSERT INTO final_decisions (recommendation_pk, overridden, final_action, "
                    f"reason_code, decided_at, recorded_at, {COPIED}) SELECT id, id % 70 = 0, "
                    f"action <> (id % 70 = 0), NULL, issued_at, issued_at, {COPIED} "
                    "FROM recommendations "
                    "WHERE id % 10 = 3"
                )
            )
        else:
            conn.execute(
                text(
                    "INSERT INTO recommendations (id, recommendation_id, request_id, "
                    "request_fingerprint, case_id, policy, version, score, attributes, "
                    '"group", rule, probability, draw, action, action_label, issued_at, '
                    "shadow_version, shadow_probability, shadow_action, record_hash) "
                    "SELECT i, 'r' || lpad(i::text, 35, '0'), 'q' || i, 'f', 'c' || i, "
                    f"'{POLICY}', 1, s, '{{}}', {_group_sql('i')}, 'r', "
                    "CASE WHEN s >= 0.2 THEN 1.0 ELSE 0.0 END, 0.5, s >= 0.2, 'offer', "
                    "timestamptz '2026-10-01 00:00:00+00' + (i - 1) * "
                    f"(interval '2678400 seconds' / {n}), "
                    "CASE WHEN i % 2 = 0 THEN 2 END, "
                    "CASE WHEN i % 2 = 0 THEN (CASE WHEN s >= 0.25 THEN 1.0 ELSE 0.0 END) END, "
                    "CASE WHEN i % 2 = 0 THEN s >= 0.25 END, 'h' "
                    f"FROM (SELECT i, random() AS s FROM generate_series(1, {n}) AS i) AS base"
                )
            )
            conn.execute(
                text(
                    "INSERT INTO outcomes (recommendation_pk, outcome, observed_at, source, "
                    f"recorded_at, corrections, {COPIED}) SELECT id, (random() < score)::int, "
                    f"issued_at, 'bench', issued_at, 0, {COPIED} FROM recommendations "
                    "WHERE id % 10 <> 0"
                )
            )
            conn.execute(
                text(
                    "INSERT INTO final_decisions (recommendation_pk, overridden, final_action, "
                    f"reason_code, decided_at, recorded_at, {COPIED}) SELECT id, id % 70 = 0, "
                    f"action <> (id % 70 = 0), NULL, issued_at, issued_at, {COPIED} "
                    "FROM recommendations "
                    "WHERE id % 10 = 3"
                )
            )
    with engine.connect() as conn:
        if sqlite:
            conn.execute(text("ANALYZE"))
        else:
            conn.execution_options(isolation_level="AUTOCOMMIT").execute(text("VACUUM ANALYZE"))
    engine.dispose()
    return time.perf_counter() - started


_CHILD = """
import json, resource, sys, time
from service.audit.job import run_audit
from service.audit.month import Month
from service.settings import Settings
from service.store.db import create_db_engine, create_session_factory
factory = create_session_factory(create_db_engine(Settings(database_url=sys.argv[1])))
with factory() as session:
    started, cpu = time.perf_counter(), time.process_time()
    run = run_audit(session, sys.argv[2], Month.parse(sys.argv[3]))
    session.commit()
    elapsed, cpu = time.perf_counter() - started, time.process_time() - cpu
peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
n = run.result.internal.row_counts["recommendations"]
print(json.dumps({"seconds": elapsed, "cpu": cpu, "peak_mb": peak_kb / 1024, "rows": n}))
"""


def time_audit(url: str) -> dict[str, Any]:
    out = subprocess.run(
        [sys.executable, "-c", _CHILD, url, POLICY, MONTH],
        check=True,
        capture_output=True,
        text=True,
        cwd=ROOT,
    )
    result: dict[str, Any] = json.loads(out.stdout.strip().splitlines()[-1])
    return result


def bench(backend: str, n: int, repeats: int) -> dict[str, Any]:
    tmp = tempfile.TemporaryDirectory(prefix="evenhand-bench-")
    drop = None
    if backend == "sqlite":
        url = f"sqlite:///{tmp.name}/bench.db"
    else:
        server = make_url(PG_SERVER)
        name = f"evenhand_bench_{uuid.uuid4().hex[:10]}"
        admin = create_engine(server, isolation_level="AUTOCOMMIT")
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
        url = server.set(database=name).render_as_string(hide_password=False)

        def drop() -> None:
            with admin.connect() as conn:
                conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
            admin.dispose()

    try:
        print(f"{backend} {n:,}: loading ...", file=sys.stderr, flush=True)
        load_s = load(url, n)
        print(f"{backend} {n:,}: loaded in {load_s:.1f} s; auditing", file=sys.stderr, flush=True)
        runs = [time_audit(url) for _ in range(repeats)]
        for r in runs:
            assert r["rows"] == n, r
        best = min(runs, key=lambda r: r["seconds"])
        peak = max(r["peak_mb"] for r in runs)
        print(
            f"{backend} {n:,}: best {best['seconds']:.3f} s of "
            f"{[round(r['seconds'], 3) for r in runs]}, peak RSS {peak:.0f} MB",
            file=sys.stderr,
            flush=True,
        )
        return {
            "backend": backend,
            "rows": n,
            "seconds": best["seconds"],
            "cpu": min(r["cpu"] for r in runs),
            "peak_mb": peak,
        }
    finally:
        if drop is not None:
            drop()
        tmp.cleanup()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", default="1000000,4000000")
    parser.add_argument("--backends", default="sqlite,postgresql")
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    results = [bench(b, n, args.repeats) for b in args.backends.split(",") for n in sizes]
    limits = {"sqlite": 2.0, "postgresql": 1.0}
    print("| backend | recommendations | audit, wall (best) | job CPU (best) | peak RSS | target |")
    print("|---|---:|---:|---:|---:|---|")
    for r in results:
        base = next(
            (x for x in results if x["backend"] == r["backend"] and x["rows"] == 1_000_000), None
        )
        if r["rows"] == 1_000_000:
            target = f"<= {limits[r['backend']]:g} s"
            ok = r["seconds"] <= limits[r["backend"]]
        elif base is not None:
            ratio = r["seconds"] / base["seconds"]
            target = f"<= 4.5 x the 1M time (here {ratio:.2f} x)"
            ok = ratio <= 4.5
        else:
            target, ok = "-", True
        ok = ok and r["peak_mb"] <= 300
        print(
            f"| {r['backend']} | {r['rows']:,} | {r['seconds']:.3f} s | {r['cpu']:.3f} s | "
            f"{r['peak_mb']:.0f} MB | "
            f"{target}, <= 300 MB: {'met' if ok else 'MISSED'} |"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
