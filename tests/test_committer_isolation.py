"""One failing request never fails the others committed in its group.

The committer is held inside a first group while a dozen requests queue up, so they are
decided together in the next one. One of them fails: at the database (a test-only trigger or
check constraint refuses its case_id, the way the database would refuse a value it cannot
store) or in our code (its record cannot be built). The good ones must be answered and
stored, the bad one must get its own error and leave nothing behind. On the code before
per-request isolation, every request of the group got the bad one's error.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

import pytest
from sqlalchemy import Engine, text
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

import service.store.committer as committer_module
from service.api.recommendation_schemas import RecommendationRequest
from service.store import decision_pipeline
from service.store.committer import GroupCommitter
from service.store.scoring import ScoringContext
from tests.helpers import count_rows, live_scoring_context, make_request

GOOD = 10


@pytest.fixture
def ctx(session_factory: sessionmaker[Session]) -> ScoringContext:
    return live_scoring_context(session_factory)


@pytest.fixture
def refuse_poison(engine: Engine) -> Iterator[None]:
    """The database refuses to store a record whose case_id starts with 'poison'."""
    with engine.begin() as conn:
        if engine.dialect.name == "postgresql":
            conn.execute(
                text(
                    "ALTER TABLE recommendations ADD CONSTRAINT test_refuse_poison "
                    "CHECK (case_id NOT LIKE 'poison%')"
                )
            )
        else:
            conn.execute(
                text(
                    "CREATE TRIGGER test_refuse_poison BEFORE INSERT ON recommendations "
                    "WHEN NEW.case_id LIKE 'poison%' "
                    "BEGIN SELECT RAISE(ABORT, 'test: poison refused'); END"
                )
            )
    try:
        yield
    finally:
        with engine.begin() as conn:
            if engine.dialect.name == "postgresql":
                conn.execute(text("ALTER TABLE recommendations DROP CONSTRAINT test_refuse_poison"))
            else:
                conn.execute(text("DROP TRIGGER test_refuse_poison"))


def _in_one_group(
    engine: Engine,
    ctx: ScoringContext,
    monkeypatch: pytest.MonkeyPatch,
    requests: list[RecommendationRequest],
) -> tuple[list[Any], list[int]]:
    """Each request's answer or error, all queued while the committer is held in a first
    group of one; and the sizes of the groups decided."""
    real = committer_module.recommend_group
    sizes: list[int] = []
    entered, gate = threading.Event(), threading.Event()

    def held_first(conn: Any, reqs: Any, context: Any) -> Any:
        if not sizes:
            entered.set()
            assert gate.wait(30)
        sizes.append(len(reqs))
        return real(conn, reqs, context)

    monkeypatch.setattr(committer_module, "recommend_group", held_first)
    committer = GroupCommitter(engine, ctx)
    committer.start()

    def one(req: RecommendationRequest) -> Any:
        try:
            return committer.recommend_blocking(req)
        except Exception as exc:
            return exc

    try:
        with ThreadPoolExecutor(max_workers=len(requests) + 1) as pool:
            first = pool.submit(one, RecommendationRequest.model_validate(make_request()))
            assert entered.wait(30)
            futures: list[Future[Any]] = [pool.submit(one, r) for r in requests]
            deadline = time.monotonic() + 30
            while committer.queued() < len(requests) and time.monotonic() < deadline:
                time.sleep(0.01)
            gate.set()
            assert isinstance(first.result(), tuple)
            results = [f.result() for f in futures]
    finally:
        gate.set()
        committer.stop()
    return results, sizes


def _requests(bad_case: str) -> list[RecommendationRequest]:
    reqs = [RecommendationRequest.model_validate(make_request()) for _ in range(GOOD)]
    reqs.insert(4, RecommendationRequest.model_validate(make_request(case_id=bad_case)))
    return reqs


def _check(
    results: list[Any],
    sizes: list[int],
    session_factory: sessionmaker[Session],
    is_bad_error: Callable[[Any], bool],
) -> None:
    assert sizes[:2] == [1, GOOD + 1]  # the test's premise: one group held them all
    bad = results.pop(4)
    assert is_bad_error(bad), bad
    assert all(isinstance(r, tuple) and r[1] is True for r in results), results
    assert count_rows(session_factory, "recommendations") == GOOD + 1  # with the first


def test_a_request_the_database_refuses_fails_alone(
    engine: Engine,
    ctx: ScoringContext,
    refuse_poison: None,
    monkeypatch: pytest.MonkeyPatch,
    session_factory: sessionmaker[Session],
) -> None:
    results, sizes = _in_one_group(engine, ctx, monkeypatch, _requests("poison-1"))
    _check(results, sizes, session_factory, lambda e: isinstance(e, IntegrityError))


def test_a_request_that_cannot_be_built_fails_alone(
    engine: Engine,
    ctx: ScoringContext,
    monkeypatch: pytest.MonkeyPatch,
    session_factory: sessionmaker[Session],
) -> None:
    real_record = decision_pipeline._record

    def record(plan: Any, req: Any, *args: Any) -> Any:
        if req.case_id == "unbuildable":
            raise ValueError("test: this record cannot be built")
        return real_record(plan, req, *args)

    monkeypatch.setattr(decision_pipeline, "_record", record)
    results, sizes = _in_one_group(engine, ctx, monkeypatch, _requests("unbuildable"))
    _check(results, sizes, session_factory, lambda e: isinstance(e, ValueError))


def test_over_http_the_refused_request_alone_gets_500(
    client: Any,
    tokens: dict[str, str],
    publish: Callable[..., int],
    refuse_poison: None,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """The bad request's answer is an internal error of its own; the others are 201."""
    from tests.helpers import bearer

    publish()
    headers = bearer(tokens["scoring"])
    bodies = [make_request() for _ in range(6)]
    bodies[2] = make_request(case_id="poison-2")
    with ThreadPoolExecutor(max_workers=6) as pool:
        answers = list(
            pool.map(lambda b: client.post("/v1/recommendations", json=b, headers=headers), bodies)
        )
    statuses = [a.status_code for a in answers]
    assert statuses[2] == 500 and answers[2].json()["error"]["code"] == "internal_error"
    assert statuses[:2] + statuses[3:] == [201] * 5
