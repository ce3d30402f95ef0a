"""Sealing and verifying the decision log: time for N records, SQLite and PostgreSQL.

Fills a fresh database with N recommendations through the store's batch path, then times one
seal over all of them (on SQLite the seal holds the write lock that long) and a full verify.
Not a test, no asserts. Run: ``.venv/bin/python benchmarks/bench_seal.py [-n 100000]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import uuid
from pathlib import Path

from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from store_hot_path import prepare, request

from service.audit.seal import seal_all_pending, verify_log
from service.store.db import create_db_engine, create_session_factory
from service.store.scoring import DocumentCache, ScoringContext, recommend_batch


def run(url: str, n: int) -> None:
    settings = prepare(url)
    engine = create_db_engine(settings)
    factory = create_session_factory(engine)
    ctx = ScoringContext(settings.draw_key(), DocumentCache())
    for start in range(0, n, 5000):
        recommend_batch(engine, [request() for _ in range(min(5000, n - start))], ctx)
    with factory() as session:
        t = time.perf_counter()
        seals = seal_all_pending(session)
        sealed = time.perf_counter() - t
    with factory() as session:
        t = time.perf_counter()
        result = verify_log(session)
        verified = time.perf_counter() - t
    count = sum(s.record_count for s in seals)
    print(f"  seal {count:,} records: {sealed:.2f} s ({len(seals)} seal(s))")
    print(f"  verify: {verified:.2f} s ({n / verified:,.0f} records/s), ok={result.ok}")
    engine.dispose()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-n", type=int, default=100_000, help="records to seal and verify")
    args = parser.parse_args()
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    with tempfile.TemporaryDirectory() as tmp:
        print("sqlite (synchronous=FULL):")
        run(f"sqlite:///{tmp}/seal.db", args.n)
    server = make_url(
        os.environ.get(
            "EVENHAND_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
        )
    )
    name = f"evenhand_bench_{uuid.uuid4().hex[:8]}"
    admin = create_engine(server, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
    except Exception as exc:
        print(f"postgresql: skipped ({type(exc).__name__})")
        return
    try:
        print("postgresql:")
        run(server.set(database=name).render_as_string(hide_password=False), args.n)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


if __name__ == "__main__":
    main()
