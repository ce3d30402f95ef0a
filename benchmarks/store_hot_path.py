"""Where the scoring hot path spends its time, in process (no HTTP): a companion to the
end-to-end benchmark, to tell CPU cost from the disk flush of a durable commit.

For a fresh SQLite file (and PostgreSQL when reachable) it reports, per decision:
1. ``recommend`` without committing (our CPU + two statements);
2. the same with a commit each (adds one durable flush per decision);
3. through the group committer from 16 threads (flushes shared by a group);
4. groups of 8 through ``recommend_group`` on one connection, as the committer decides them,
   all in one transaction, then with a durable commit per group: CPU time (user + system, so
   the kernel's share of writing and flushing counts) per decision, the store's floor under
   a single request;
5. batches of 5,000 through ``recommend_batch`` with one commit each.
Not a test, no asserts. Run: ``.venv/bin/python benchmarks/store_hot_path.py``.
"""

from __future__ import annotations

import argparse
import os
import random
import sys
import tempfile
import time
import uuid
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service.api.recommendation_schemas import RecommendationRequest
from service.settings import Settings
from service.store import keys, lifecycle
from service.store.committer import GroupCommitter
from service.store.db import create_db_engine, create_session_factory
from service.store.migrate import upgrade
from service.store.scoring import (
    DocumentCache,
    ScoringContext,
    recommend,
    recommend_batch,
    recommend_group,
)

POLICY = {
    "name": "bench",
    "score_meaning": "P(outcome)",
    "action_label": "act",
    "no_action_label": "wait",
    "favourable": "action",
    "costs": {"false_positive": 1.0, "false_negative": 4.0},
    "groups": {"attributes": ["region"], "known": ["north", "south"]},
    "rules": {
        "north": {"steps": [{"from": 0.3, "probability": 1.0}]},
        "south": {"steps": [{"from": 0.2, "probability": 0.5}, {"from": 0.4, "probability": 1.0}]},
    },
}
RNG = random.Random(20261201)
GROUP = 8  # about what the committer gathers under bench_scoring.py's 16 connections


def request() -> RecommendationRequest:
    return RecommendationRequest(
        request_id=uuid.uuid4().hex,
        case_id=uuid.uuid4().hex[:10],
        policy="bench",
        score=RNG.random(),
        attributes={"region": RNG.choice(["north", "south"])},
    )


def prepare(url: str) -> Settings:
    upgrade(url)
    settings = Settings(database_url=url, draw_secret="b" * 64)  # type: ignore[arg-type]
    factory = create_session_factory(create_db_engine(settings))
    with factory() as s:
        a = keys.Actor.of(keys.create_key(s, "a", "admin")[0])
        b = keys.Actor.of(keys.create_key(s, "b", "admin")[0])
        lifecycle.submit(s, "bench", POLICY, a)
        lifecycle.approve(s, "bench", 1, b)
        lifecycle.activate(s, "bench", 1, a, expected_current=None)
        s.commit()
    return settings


def run(url: str, n: int) -> None:
    settings = prepare(url)
    engine = create_db_engine(settings)
    factory = create_session_factory(engine)
    ctx = ScoringContext(settings.draw_key(), DocumentCache())
    with factory() as s:
        recommend(s.connection(), request(), ctx)  # warm the document cache
        s.commit()
        reqs = [request() for _ in range(n)]
        t = time.perf_counter()
        for r in reqs:
            recommend(s.connection(), r, ctx)
        cpu = (time.perf_counter() - t) / n
        s.commit()
        reqs = [request() for _ in range(n)]
        t = time.perf_counter()
        for r in reqs:
            recommend(s.connection(), r, ctx)
            s.commit()
        each = (time.perf_counter() - t) / n
    group_cpu: dict[bool, float] = {}
    with engine.connect() as conn:
        for durable in (False, True):
            groups = [[request() for _ in range(GROUP)] for _ in range(4 * n // GROUP)]
            t = time.process_time()
            if durable:
                for group in groups:
                    with conn.begin():
                        recommend_group(conn, group, ctx)
            else:
                with conn.begin():
                    for group in groups:
                        recommend_group(conn, group, ctx)
            group_cpu[durable] = (time.process_time() - t) / (len(groups) * GROUP)
    committer = GroupCommitter(engine, ctx)
    committer.start()
    reqs = [request() for _ in range(4 * n)]

    def one(r: RecommendationRequest) -> None:
        committer.recommend_blocking(r)

    t = time.perf_counter()
    with ThreadPoolExecutor(max_workers=16) as pool:
        list(pool.map(one, reqs))
    grouped = (time.perf_counter() - t) / len(reqs)
    committer.stop()
    batches = []
    for _ in range(4):
        items = [request() for _ in range(5000)]
        t = time.perf_counter()
        recommend_batch(engine, items, ctx)  # decides, writes and commits
        batches.append(time.perf_counter() - t)
    print(f"  recommend, no commit        {cpu * 1000:7.3f} ms/decision")
    print(f"  recommend + commit each     {each * 1000:7.3f} ms/decision")
    print(f"  group committer, 16 threads {grouped * 1000:7.3f} ms/decision")
    for durable, label in ((False, "one commit"), (True, "commit each")):
        text = f"groups of {GROUP}, {label}"
        print(f"  {text:<28}{group_cpu[durable] * 1000:7.3f} ms CPU/decision")
    best = min(batches)
    print(
        f"  batch of 5,000 + commit     {best:7.3f} s  ({5000 / best:,.0f} decisions/s, best of 4)"
    )
    engine.dispose()


def on_each_database(run: Callable[[str], None]) -> None:
    """``run(url)`` on a fresh SQLite file, then on a fresh PostgreSQL database of its own
    (created on the local server and dropped after; skipped when the server is not there)."""
    with tempfile.TemporaryDirectory() as tmp:
        print("sqlite (synchronous=FULL):")
        run(f"sqlite:///{tmp}/bench.db")
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
        run(server.set(database=name).render_as_string(hide_password=False))
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-n", type=int, default=300, help="single decisions per measurement")
    args = parser.parse_args()
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    on_each_database(lambda url: run(url, args.n))


if __name__ == "__main__":
    main()
