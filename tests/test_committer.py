"""The group committer: single requests decided in shared transactions, each on its own.

What a group must give is what the requests would get one at a time: the engine's decision
for a new request, the stored answer for a repeat, a 409 for a reused request_id, a refusal
for a request that cannot be decided (and nothing written for it), and a record that is
committed before its answer returns.
"""

from __future__ import annotations

import json
import uuid
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import pytest
from sqlalchemy import Engine, select, text
from sqlalchemy.orm import Session, sessionmaker

from service.api.recommendation_schemas import RecommendationRequest
from service.errors import Conflict, Unprocessable
from service.policy.document import PolicyDocument
from service.policy.errors import UnknownGroup
from service.policy.rules import evaluate
from service.store.committer import CommitterStopped, GroupCommitter
from service.store.models import Recommendation
from service.store.scoring import ScoringContext, recommend_group
from tests.helpers import TEST_SECRET, count_rows, live_scoring_context, make_policy, make_request

SECRET = TEST_SECRET.encode()


@pytest.fixture
def ctx(session_factory: sessionmaker[Session]) -> ScoringContext:
    return live_scoring_context(session_factory)


def _req(**overrides: Any) -> RecommendationRequest:
    return RecommendationRequest.model_validate(make_request(**overrides))


def test_a_group_answers_as_one_request_at_a_time(engine: Engine, ctx: ScoringContext) -> None:
    first = _req(score=0.35, attributes={"region": "south"})
    repeat = first.model_copy()
    reused = first.model_copy(update={"score": 0.9})
    unknown_group = _req(attributes={"region": "east"})
    unknown_policy = _req(policy="no-such-policy")
    plain = _req(score=0.1)
    group = [first, unknown_group, repeat, unknown_policy, reused, plain]

    with engine.connect() as conn, conn.begin():
        results = recommend_group(conn, group, ctx)

    doc = PolicyDocument.model_validate(make_policy())
    text_answer, created = results[0]  # type: ignore[misc]
    answer = json.loads(text_answer)
    expected = evaluate(doc, 1, 0.35, {"region": "south"}, first.case_id, SECRET)
    assert created is True
    assert (answer["group"], answer["probability"], answer["draw"], answer["action"]) == (
        expected.group,
        expected.probability,
        expected.draw,
        expected.action,
    )
    assert isinstance(results[1], UnknownGroup)
    assert results[2] == (text_answer, False)  # the repeat gets the first one's stored answer
    assert isinstance(results[3], Unprocessable) and results[3].code == "unknown_policy"
    assert isinstance(results[4], Conflict) and results[4].code == "idempotency_conflict"
    assert results[5][1] is True  # type: ignore[index]
    with engine.connect() as conn:
        stored = conn.execute(text("SELECT request_id FROM recommendations")).scalars().all()
    assert sorted(stored) == sorted([first.request_id, plain.request_id])


def test_every_answer_is_committed_before_it_returns(
    engine: Engine, ctx: ScoringContext, session_factory: sessionmaker[Session]
) -> None:
    committer = GroupCommitter(engine, ctx)
    committer.start()
    requests = [_req(score=i / 100) for i in range(100)]
    requests[7] = _req(attributes={"region": "east"})  # refused, alone

    def one(req: RecommendationRequest) -> str:
        try:
            answer, created = committer.recommend_blocking(req)
        except UnknownGroup:
            return "refused"
        assert created
        # Returned means committed: another connection sees the record.
        with engine.connect() as conn:
            found = conn.execute(
                # Through the column's type: a UUID (32 hex digits in SQLite's file).
                select(Recommendation.recommendation_id).where(
                    Recommendation.request_id == req.request_id
                )
            ).scalar_one()
        assert found == json.loads(answer)["recommendation_id"]
        return "ok"

    with ThreadPoolExecutor(max_workers=16) as pool:
        outcomes = list(pool.map(one, requests))
    committer.stop()
    with pytest.raises(CommitterStopped):
        committer.recommend_blocking(_req())

    assert outcomes.count("refused") == 1 and outcomes[7] == "refused"
    assert count_rows(session_factory, "recommendations") == 99


def test_concurrent_repeats_are_written_once(
    engine: Engine, ctx: ScoringContext, session_factory: sessionmaker[Session]
) -> None:
    committer = GroupCommitter(engine, ctx)
    committer.start()
    body = make_request(request_id=f"retry-{uuid.uuid4().hex}")
    tries = [RecommendationRequest.model_validate(body) for _ in range(24)]
    with ThreadPoolExecutor(max_workers=12) as pool:
        answers = list(pool.map(committer.recommend_blocking, tries))
    committer.stop()
    assert [created for _, created in answers].count(True) == 1
    assert len({a for a, _ in answers}) == 1  # the same bytes each time
    assert count_rows(session_factory, "recommendations") == 1


def test_a_failed_commit_is_that_requests_error_and_the_committer_goes_on(
    engine: Engine,
    ctx: ScoringContext,
    session_factory: sessionmaker[Session],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A COMMIT the database refuses fails the group, then each request alone: every request
    gets exactly one answer (the error), nothing is written, and the next group is served."""
    committer = GroupCommitter(engine, ctx)
    committer.start()

    def refuse(_dialect: Any, dbapi_connection: Any) -> None:
        dbapi_connection.rollback()
        raise RuntimeError("forced: the commit fails")

    with monkeypatch.context() as patch:
        patch.setattr(type(engine.dialect), "do_commit", refuse)
        with pytest.raises(RuntimeError, match="forced"):
            committer.recommend_blocking(_req())
    assert count_rows(session_factory, "recommendations") == 0

    answer, created = committer.recommend_blocking(_req())  # the thread is still there
    committer.stop()
    assert created and json.loads(answer)["recommendation_id"]
    assert count_rows(session_factory, "recommendations") == 1
