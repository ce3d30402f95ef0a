"""Sealing and verifying the log: records per second, SQLite and PostgreSQL.

Fills a fresh database through the service's own write paths: N decisions through the batch
path (``recommend_batch``, what ``POST /v1/recommendations/batch`` calls, 5,000 per batch) and
one outcome for each through ``record_outcomes`` (what ``POST /v1/outcomes`` calls, 5,000 per
transaction), both leaf kinds as the service writes them. Then it times, as the periodic sealer
and ``evenhand log seal`` run them (``keep_log``): the seals of all those records (signed heads
included), the tallying of the sealed records into batches, and the seals of the batches; then a
full ``verify_log`` with the signing key trusted. Storage per decision with its outcome is
printed beside the timings. Not a test, no asserts.

Run: ``.venv/bin/python benchmarks/bench_seal.py [-n 100000]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from sqlalchemy import text
from store_hot_path import on_each_database, prepare, request

from service.store.db import create_db_engine, create_session_factory
from service.store.feedback import OutcomeReport, record_outcomes
from service.store.log_verify import verify_log
from service.store.scoring import DocumentCache, ScoringContext, recommend_batch
from service.store.sealing import seal_all_pending
from service.store.signing import Signer
from service.store.tally_batches import tally_pending

BATCH = 5000


def _bytes_used(url: str, engine: object) -> int:
    with engine.connect() as conn:  # type: ignore[attr-defined]
        if url.startswith("sqlite"):
            path = url.removeprefix("sqlite:///")
            wal = Path(path + "-wal")
            return os.path.getsize(path) + (wal.stat().st_size if wal.exists() else 0)
        return int(
            conn.execute(
                text(
                    "SELECT sum(pg_total_relation_size(c.oid)) FROM pg_class c "
                    "JOIN pg_namespace n ON n.oid = c.relnamespace "
                    "WHERE n.nspname = 'public' AND c.relkind = 'r'"
                )
            ).scalar_one()
        )


def run(url: str, n: int) -> None:
    settings = prepare(url)
    engine = create_db_engine(settings)
    factory = create_session_factory(engine)
    ctx = ScoringContext(settings.draw_key(), DocumentCache())
    signer = Signer.of(Ed25519PrivateKey.generate())
    t = time.perf_counter()
    ids: list[str] = []
    for start in range(0, n, BATCH):
        bodies, _ = recommend_batch(engine, [request() for _ in range(min(BATCH, n - start))], ctx)
        ids += [body.split('"recommendation_id":"', 1)[1].split('"', 1)[0] for body in bodies]
    decided = time.perf_counter() - t
    t = time.perf_counter()
    observed = datetime.now(UTC)
    for start in range(0, n, BATCH):
        with factory() as session:
            reports = [
                OutcomeReport(
                    outcome=int(i % 3 == 0),
                    observed_at=observed,
                    source="bench",
                    recommendation_id=r,
                )
                for i, r in enumerate(ids[start : start + BATCH])
            ]
            record_outcomes(session, reports, actor="bench")
            session.commit()
    outcomes = time.perf_counter() - t
    t = time.perf_counter()
    seals = seal_all_pending(factory, signer)
    sealed = time.perf_counter() - t
    leaves = sum(s.leaf_count for s in seals)
    t = time.perf_counter()
    batches = 0
    while tally_pending(factory, "UTC", force=True) is not None:
        batches += 1
    tallied = time.perf_counter() - t
    t = time.perf_counter()
    batch_seals = seal_all_pending(factory, signer)
    batch_sealed = time.perf_counter() - t
    t = time.perf_counter()
    result = verify_log(factory, {signer.key_id: signer.public_key})
    verified = time.perf_counter() - t
    size = _bytes_used(url, engine)
    total = leaves + sum(s.leaf_count for s in batch_seals)
    print(f"  write {n:,} decisions (batches of {BATCH:,}): {decided:.1f} s ({n / decided:,.0f}/s)")
    print(f"  write {n:,} outcomes: {outcomes:.1f} s ({n / outcomes:,.0f}/s)")
    print(
        f"  seal {leaves:,} records: {sealed:.2f} s ({leaves / sealed:,.0f} records/s, "
        f"{len(seals)} signed head(s))"
    )
    print(f"  tally the sealed records: {tallied:.2f} s ({batches} batch(es))")
    print(f"  seal the tally batches: {batch_sealed:.2f} s")
    print(
        f"  verify {total:,} records: {verified:.2f} s ({total / verified:,.0f} records/s), "
        f"ok={result.ok}"
    )
    print(f"  storage: {size / n:,.0f} bytes per decision with its outcome (all tables)")
    engine.dispose()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-n", type=int, default=100_000, help="decisions (and outcomes) to seal")
    args = parser.parse_args()
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    on_each_database(lambda url: run(url, args.n))


if __name__ == "__main__":
    main()
