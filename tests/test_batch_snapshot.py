"""A batch is decided on a read snapshot and written after checking the snapshot still holds.

When the active version changes, or one of the batch's request_ids is stored by someone
else, between the two steps, the batch must be decided again: every record names the
version active when it was written, and a request_id is never stored twice.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import pytest
from sqlalchemy import Engine, select, text
from sqlalchemy.orm import Session, sessionmaker

from service.api.recommendation_schemas import RecommendationRequest
from service.store import keys, lifecycle, scoring
from service.store.models import Recommendation
from service.store.scoring import DocumentCache, PreparedBatch, ScoringContext
from tests.helpers import TEST_SECRET, actor, make_policy, make_request


@pytest.fixture
def ctx(session_factory: sessionmaker[Session]) -> ScoringContext:
    with session_factory() as s:
        author = keys.Actor.of(keys.create_key(s, "author", "admin")[0])
        reviewer = keys.Actor.of(keys.create_key(s, "reviewer", "admin")[0])
        for version in (1, 2):
            lifecycle.submit(s, "readmission", make_policy(description=f"v{version}"), author)
            lifecycle.approve(s, "readmission", version, reviewer)
        lifecycle.activate(s, "readmission", 1, author, expected_current=None)
        s.commit()
    return ScoringContext(TEST_SECRET.encode(), DocumentCache())


def _batch(n: int) -> list[RecommendationRequest]:
    return [RecommendationRequest.model_validate(make_request()) for _ in range(n)]


def _between_the_steps(
    monkeypatch: pytest.MonkeyPatch, action: Callable[[], None]
) -> list[PreparedBatch]:
    """Run ``action`` right after the batch's first (read-only) decision."""
    prepared: list[PreparedBatch] = []
    original = scoring.prepare_batch

    def prepare_then_act(conn, items, ctx):  # type: ignore[no-untyped-def]
        result = original(conn, items, ctx)
        if not prepared:
            action()
        prepared.append(result)
        return result

    monkeypatch.setattr(scoring, "prepare_batch", prepare_then_act)
    return prepared


def _versions(engine: Engine) -> list[int]:
    with engine.connect() as conn:
        return list(conn.execute(text("SELECT version FROM recommendations")).scalars())


def test_a_version_switch_between_the_steps_is_seen(
    engine: Engine,
    ctx: ScoringContext,
    session_factory: sessionmaker[Session],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    def switch() -> None:
        with session_factory() as s:
            author = actor(session_factory, "author")
            lifecycle.activate(
                s, "readmission", 2, author, reason="switch mid-batch", expected_current=1
            )
            s.commit()

    prepared = _between_the_steps(monkeypatch, switch)
    responses, created = scoring.recommend_batch(engine, _batch(20), ctx)

    assert len(prepared) == 2  # decided again inside the write transaction
    assert created == 20 and all('"version":2' in r for r in responses)
    assert _versions(engine) == [2] * 20


def test_a_request_id_stored_meanwhile_is_answered_from_the_store(
    engine: Engine,
    ctx: ScoringContext,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    items: Sequence[RecommendationRequest] = _batch(10)

    def store_one() -> None:
        with engine.connect() as conn, conn.begin():
            scoring.recommend(conn, items[3], ctx)

    prepared = _between_the_steps(monkeypatch, store_one)
    responses, created = scoring.recommend_batch(engine, items, ctx)

    assert len(prepared) == 2
    assert created == 9  # the stored one is a replay now, not a second record
    assert len(_versions(engine)) == 10
    with engine.connect() as conn:
        stored_id = conn.execute(
            # Through the column's type: a UUID (32 hex digits in SQLite's file).
            select(Recommendation.recommendation_id).where(
                Recommendation.request_id == items[3].request_id
            )
        ).scalar_one()
    assert stored_id in responses[3]


def test_an_unchanged_snapshot_is_written_as_decided(
    engine: Engine, ctx: ScoringContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    prepared = _between_the_steps(monkeypatch, lambda: None)
    responses, created = scoring.recommend_batch(engine, _batch(5), ctx)
    assert len(prepared) == 1 and created == 5
    assert [r.recommendation_id for r in prepared[0].rows] == [
        r.split('"recommendation_id":"')[1][:36] for r in responses
    ]
