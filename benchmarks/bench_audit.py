"""Audit command benchmark: ``evenhand audit run`` on a month written through the write path.

Targets (issue 17): a month of 1,000,000 decisions audited in at most 1 s wall on PostgreSQL
and at most 1.5 s on SQLite, start-up of the command included.

Each database is fresh (a SQLite file, or a PostgreSQL database of its own, dropped after)
and filled by ``benchmarks/log_load.py``: decisions by the batch scoring function, outcomes
(90%) by the outcome recording function a month later, sealed and tallied by the periodic
sealer's own function, so the rows are those the service writes (``tests/test_bench_rows.py``
compares them). The audit is then run as a user runs it: ``python -m service.cli.main audit
run`` in a fresh process, wall time around the process (start-up, imports, counting, snapshot
written), the best of ``--repeats`` runs, with the process's own CPU time (user + system; on
PostgreSQL the server's share is not in it) and the load average read before each run. On
PostgreSQL the runs are made twice: right after loading (with whatever statistics autovacuum
gathered meanwhile) and after ``ANALYZE``. Storage per decision: on PostgreSQL the sum of
``pg_total_relation_size`` (heap, TOAST and indexes) over the schema's tables, on SQLite the
file's size after a checkpoint, divided by the decisions (each with its outcome, if any).

    nice -n 10 .venv/bin/python benchmarks/bench_audit.py --sizes 100000,1000000
    .venv/bin/python benchmarks/bench_audit.py --database sqlite:////tmp/month.db --sizes 1000000
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

from sqlalchemy import create_engine, make_url, text

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import log_load  # noqa: E402

PG_SERVER = os.environ.get(
    "EVENHAND_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
TARGETS = {"sqlite": 1.5, "postgresql": 1.0}
COMMAND = (sys.executable, "-m", "service.cli.main", "audit", "run")


def run_audit_command(url: str) -> dict[str, Any]:
    """One ``evenhand audit run`` in a fresh process: wall seconds, the job's own seconds."""
    env = {**os.environ, "EVENHAND_DATABASE_URL": url, "EVENHAND_TIMEZONE": "UTC"}
    load = os.getloadavg()[0]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    started = time.perf_counter()
    out = subprocess.run(
        [*COMMAND, "--policy", log_load.POLICY, "--month", log_load.MONTH],
        check=True,
        capture_output=True,
        text=True,
        cwd=ROOT,
        env=env,
    )
    wall = time.perf_counter() - started
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    job = re.search(r"done in ([0-9.]+) s", out.stderr)
    counted = re.search(r"snapshot \d+: ([0-9,]+) recommendations", out.stderr)
    return {
        "wall": wall,
        "cpu": cpu,
        "job": float(job.group(1)) if job else None,
        "decisions": int(counted.group(1).replace(",", "")) if counted else None,
        "load": load,
    }


def storage_bytes(url: str) -> int:
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            if engine.dialect.name == "sqlite":
                conn.execute(text("PRAGMA wal_checkpoint(TRUNCATE)"))
                path = make_url(url).database
                assert path is not None
                return os.path.getsize(path)
            return int(
                conn.execute(
                    text(
                        "SELECT sum(pg_total_relation_size(c.oid)) FROM pg_class c "
                        "JOIN pg_namespace n ON n.oid = c.relnamespace "
                        "WHERE n.nspname = 'public' AND c.relkind = 'r'"
                    )
                ).scalar()
                or 0
            )
    finally:
        engine.dispose()


def analyze(url: str) -> None:
    engine = create_engine(url, isolation_level="AUTOCOMMIT")
    with engine.connect() as conn:
        conn.execute(text("ANALYZE"))
    engine.dispose()


def timed(url: str, repeats: int) -> dict[str, Any]:
    runs = [run_audit_command(url) for _ in range(repeats)]
    best = min(runs, key=lambda r: r["wall"])
    return {
        "best": best,
        "walls": [round(r["wall"], 3) for r in runs],
        "loads": [round(r["load"], 2) for r in runs],
    }


def fresh_database(backend: str, tmp: str) -> tuple[str, Callable[[], None]]:
    if backend == "sqlite":
        return f"sqlite:///{tmp}/month.db", lambda: None
    server = make_url(PG_SERVER)
    name = f"evenhand_bench_{uuid.uuid4().hex[:10]}"
    admin = create_engine(server, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))

    def drop() -> None:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()

    return server.set(database=name).render_as_string(hide_password=False), drop


def measure(url: str, n: int, repeats: int, load_seconds: float | None) -> list[dict[str, Any]]:
    backend = make_url(url).get_backend_name()
    size = storage_bytes(url)
    stages = [("as loaded", None)]
    if backend == "postgresql":
        stages.append(("after ANALYZE", analyze))
    results = []
    for stage, before in stages:
        if before is not None:
            before(url)
        t = timed(url, repeats)
        assert t["best"]["decisions"] in (None, n), t
        result = {
            "backend": backend,
            "decisions": n,
            "stage": stage,
            "wall": t["best"]["wall"],
            "cpu": t["best"]["cpu"],
            "job": t["best"]["job"],
            "walls": t["walls"],
            "loads": t["loads"],
            "bytes_per_decision": size / n,
            "load_seconds": load_seconds,
        }
        print(json.dumps(result), file=sys.stderr, flush=True)
        results.append(result)
    return results


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", default="100000,1000000")
    parser.add_argument("--backends", default="sqlite,postgresql")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument(
        "--database", help="time this database, loaded by log_load.py (one size), instead"
    )
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    results: list[dict[str, Any]] = []
    if args.database:
        results += measure(args.database, sizes[0], args.repeats, None)
    else:
        for backend in args.backends.split(","):
            for n in sizes:
                with tempfile.TemporaryDirectory(prefix="evenhand-bench-") as tmp:
                    url, drop = fresh_database(backend, tmp)
                    try:
                        loaded = log_load.load(url, n)
                        results += measure(url, n, args.repeats, loaded.seconds)
                    finally:
                        drop()
    print(
        "| database | decisions | stage | audit command, wall (best) | its CPU | job alone | "
        "runs | load avg | storage per decision | target |"
    )
    print("|---|---:|---|---:|---:|---:|---|---|---:|---|")
    for r in results:
        limit = TARGETS[r["backend"]]
        verdict = (
            f"<= {limit:g} s: {'met' if r['wall'] <= limit else 'MISSED'}"
            if r["decisions"] == 1_000_000
            else "-"
        )
        job = "-" if r["job"] is None else f"{r['job']:.2f} s"
        print(
            f"| {r['backend']} | {r['decisions']:,} | {r['stage']} | {r['wall']:.2f} s | "
            f"{r['cpu']:.2f} s | {job} | "
            f"{', '.join(f'{w:.2f}' for w in r['walls'])} | "
            f"{', '.join(f'{x:.1f}' for x in r['loads'])} | "
            f"{r['bytes_per_decision']:.0f} B | {verdict} |"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
