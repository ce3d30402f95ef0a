"""A month of decisions written exactly as the service writes them, for the benchmarks.

Everything goes through the service's own write-path functions, in process and in large
batches (HTTP would add nothing to the rows, only hours to a load of millions):

- the policy is submitted, approved, activated and given a shadow version by
  ``service.store.lifecycle`` with two admin keys made by ``service.store.keys``;
- decisions are made by ``service.store.scoring.recommend_batch``, the function the batch route
  ``POST /v1/recommendations/batch`` calls, with the same ``RecommendationRequest`` items;
- outcomes are posted a month later by ``service.store.feedback.record_outcomes``, the function
  the outcome routes call, committed as the route commits;
- the log is kept by ``service.store.log_upkeep.keep_log``, the periodic sealer's own function
  (seals, tally batches when due, seals of the batches), every ``seal_every`` decisions and at
  the end.

The one thing changed is the clock: every module of the service that reads ``utcnow`` is given
a clock that walks through the month (decisions spread evenly over it; outcomes and their
recording a month later), so the month can be audited as a past month. Nothing else is
replaced; ``tests/test_bench_rows.py`` compares rows written here with rows written through
the HTTP routes.

    nice -n 10 .venv/bin/python benchmarks/log_load.py sqlite:////tmp/month.db --decisions 100000
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from service.api.recommendation_schemas import RecommendationRequest  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.store import feedback, keys, lifecycle, models  # noqa: E402
from service.store.db import create_db_engine, create_session_factory  # noqa: E402
from service.store.feedback import OutcomeReport  # noqa: E402
from service.store.log_upkeep import keep_log  # noqa: E402
from service.store.migrate import upgrade  # noqa: E402
from service.store.scoring import DocumentCache, ScoringContext, recommend_batch  # noqa: E402
from service.store.signing import Signer  # noqa: E402

POLICY = "fernhollow-bench"
MONTH = "2026-10"
MONTH_START = datetime(2026, 10, 1, tzinfo=UTC)
MONTH_SECONDS = 31 * 86_400
COMMUNITIES = ("quarry-hill", "millbrook", "saltmarsh")
LANGUAGES = ("en", "es", "other")
DRAW_SECRET = "benchmark-draw-secret-0123456789abcdef-not-for-production"
SIGNING_KEY = bytes(range(32))
"""Fixed keys of the benchmark's own (never for production)."""
SIGNER = Signer.of(Ed25519PrivateKey.from_private_bytes(SIGNING_KEY))
OUTCOME_SHARE = 0.9
"""The share of decisions whose outcome is posted."""
OUTCOME_DELAY = timedelta(days=30)
BATCH = 10_000
"""Items per call of the batch write path (the service's default EVENHAND_MAX_BATCH_ITEMS)."""

Progress = Callable[[str], None]


def _stderr(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def bench_document(cut: float) -> dict[str, Any]:
    """Nine groups (3 communities x 3 languages); one threshold per community."""
    known = [f"{c}|{lang}" for c in COMMUNITIES for lang in LANGUAGES]
    return {
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
        "rules": {c: {"steps": [{"from": cut, "probability": 1.0}]} for c in COMMUNITIES},
        "targets": {
            "criterion": "equal-opportunity",
            "tolerance": 0.05,
            "groups": {k: {"action_rate": 0.3, "tpr": 0.7, "fpr": 0.2} for k in known},
        },
    }


class Clock:
    """The time the service's modules see while the loader runs (set by :func:`clock`)."""

    def __init__(self, at: datetime) -> None:
        self.at = at

    def __call__(self) -> datetime:
        return self.at


@contextmanager
def clock(at: datetime) -> Iterator[Clock]:
    """Give every loaded module of the service that calls ``utcnow`` a settable clock."""
    real = models.utcnow
    fake = Clock(at)
    patched = [
        m
        for name, m in list(sys.modules.items())
        if name.startswith("service.") and getattr(m, "utcnow", None) is real
    ]
    for m in patched:
        m.utcnow = fake  # type: ignore[attr-defined]
    try:
        yield fake
    finally:
        for m in patched:
            m.utcnow = real  # type: ignore[attr-defined]


def settings_for(url: str, draw_secret: str = DRAW_SECRET) -> Settings:
    return Settings(database_url=url, draw_secret=draw_secret)  # type: ignore[arg-type]


def request_items(start: int, count: int, rng: np.random.Generator) -> list[RecommendationRequest]:
    """Decisions ``start`` .. ``start + count - 1``: as the batch route parses its body."""
    scores = np.round(rng.beta(2.0, 5.0, count), 4).tolist()
    return [
        RecommendationRequest.model_validate(
            {
                "request_id": f"discharge-{i:09d}",
                "case_id": f"FH-{i:09d}",
                "policy": POLICY,
                "score": scores[k],
                "attributes": {
                    "community": COMMUNITIES[i % 3],
                    "language": LANGUAGES[(i // 3) % 3],
                },
            }
        )
        for k, i in enumerate(range(start, start + count))
    ]


def put_live(factory: sessionmaker[Session]) -> str:
    """Version 1 active, version 2 its shadow, by two admins (the store functions the policy
    routes call); returns the token of a new scoring key, ``bench-scoring``."""
    with factory() as session:
        author_key, _ = keys.create_key(session, "bench-author", "admin")
        approver_key, _ = keys.create_key(session, "bench-approver", "admin")
        _, token = keys.create_key(session, "bench-scoring", "scoring")
        session.commit()
        author, approver = keys.Actor.of(author_key), keys.Actor.of(approver_key)
        for version, cut in ((1, 0.35), (2, 0.4)):
            lifecycle.submit(session, POLICY, bench_document(cut), author)
            session.commit()
            lifecycle.approve(session, POLICY, version, approver)
            session.commit()
        lifecycle.activate(session, POLICY, 1, author, "benchmark", expected_current=None)
        session.commit()
        lifecycle.set_shadow(session, POLICY, 2, author, expected_current=None)
        session.commit()
    return token


@dataclass(frozen=True)
class Loaded:
    decisions: int
    outcomes: int
    seconds: float
    scoring_token: str
    """A scoring key's token (to add rows through the routes, as the tests do)."""


def load(
    url: str,
    decisions: int,
    *,
    seed: int = 1,
    seal_every: int = 100_000,
    draw_secret: str = DRAW_SECRET,
    progress: Progress = _stderr,
) -> Loaded:
    """Migrate a fresh database at ``url`` and write one month of ``decisions`` decisions of
    :data:`POLICY` with their outcomes, sealed and tallied by the service's own code."""
    started = time.perf_counter()
    upgrade(url)
    rng = np.random.default_rng(seed)
    settings = settings_for(url, draw_secret)
    engine = create_db_engine(settings)
    factory = create_session_factory(engine)
    ctx = ScoringContext(settings.draw_key(), DocumentCache(), settings.max_batch_items)
    step = timedelta(seconds=MONTH_SECONDS / decisions)
    posted = 0
    next_seal = seal_every
    with clock(MONTH_START - timedelta(days=2)) as now:
        token = put_live(factory)
        for start in range(0, decisions, BATCH):
            count = min(BATCH, decisions - start)
            # The batch is stamped at one time, as the service stamps it.
            now.at = MONTH_START + step * start
            recommend_batch(engine, request_items(start, count, rng), ctx)
            if (start + count) % seal_every == 0 or start + count == decisions:
                keep_log(factory, SIGNER, settings.timezone)
                progress(f"  {start + count:,} decisions ({time.perf_counter() - started:.0f} s)")
        # A month later, the outcomes, in the order the decisions were made.
        for ids in _decision_pages(factory, BATCH):
            keep = rng.random(len(ids)) < OUTCOME_SHARE
            chosen = [(rid, at, score) for (rid, at, score), k in zip(ids, keep, strict=True) if k]
            if not chosen:
                continue
            now.at = chosen[-1][1] + OUTCOME_DELAY + timedelta(hours=1)
            outcomes = (rng.random(len(chosen)) < [s for _, _, s in chosen]).astype(int)
            reports = [
                OutcomeReport(
                    outcome=int(y),
                    observed_at=at + OUTCOME_DELAY,
                    source="ehr-discharge-extract",
                    recommendation_id=rid,
                )
                for (rid, at, _), y in zip(chosen, outcomes.tolist(), strict=True)
            ]
            with factory() as session:
                feedback.record_outcomes(session, reports, "bench-scoring")
                session.commit()
            posted += len(reports)
            if posted >= next_seal:
                next_seal += seal_every
                keep_log(factory, SIGNER, settings.timezone)
                progress(f"  {posted:,} outcomes ({time.perf_counter() - started:.0f} s)")
        now.at = now.at + timedelta(hours=2)
        keep_log(factory, SIGNER, settings.timezone)
    engine.dispose()
    return Loaded(decisions, posted, time.perf_counter() - started, token)


def _decision_pages(
    factory: sessionmaker[Session], size: int
) -> Iterator[list[tuple[str, datetime, float]]]:
    """(recommendation_id, issued_at, score) of each decision, in id order, a page at a time."""
    r = models.Recommendation.__table__.c
    last = 0
    while True:
        with factory() as session:
            rows = session.execute(
                select(r.id, r.recommendation_id, r.issued_at, r.score)
                .where(r.id > last)
                .order_by(r.id)
                .limit(size)
            ).all()
        if not rows:
            return
        last = int(rows[-1].id)
        yield [(str(x.recommendation_id), x.issued_at, float(x.score)) for x in rows]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("url", help="database URL of a fresh (empty) database")
    parser.add_argument("--decisions", type=int, default=100_000)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    done = load(args.url, args.decisions, seed=args.seed)
    print(f"{done.decisions:,} decisions, {done.outcomes:,} outcomes in {done.seconds:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
