"""Sealing and verifying the decision log: time for N records, SQLite and PostgreSQL.

Fills a fresh database with N recommendations through the store's batch path, then times one
seal over all of them (on SQLite the seal holds the write lock that long) and a full verify.
Not a test, no asserts. Run: ``.venv/bin/python benchmarks/bench_seal.py [-n 100000]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from service.audit.seal import seal_all_pending, verify_log
from store_hot_path import on_each_database, prepare, request

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
    on_each_database(lambda url: run(url, args.n))


if __name__ == "__main__":
    main()
