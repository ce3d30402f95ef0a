"""Lifecycle changes under concurrency, with real threads and one session each.

Two admins doing the same thing at the same moment: exactly one changes the policy, the other
is refused with 409 (two approvals; two switches from one expected state to different
targets) or, sending the same request, is answered as a repeat and changes nothing; the
history never shows an impossible transition. Scoring while versions
are switched: every record names the version that was active at its ``issued_at`` according
to the history, and the shadow designated then.

SQLite serialises writers (BEGIN IMMEDIATE), so the races are PostgreSQL's; the tests run on
both. Each race is tried many times: on the code before the policy lock, the PostgreSQL
runs failed within the first few tries.
"""

from __future__ import annotations

import threading
import uuid
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import pytest
from sqlalchemy import Engine, select
from sqlalchemy.orm import Session, sessionmaker

from service.api.recommendation_schemas import RecommendationRequest
from service.errors import ServiceError
from service.store import keys, lifecycle, policies
from service.store.committer import GroupCommitter
from service.store.keys import Actor
from service.store.models import PolicyEvent, Recommendation
from service.store.scoring import DocumentCache, ScoringContext, recommend_batch
from tests.helpers import TEST_SECRET, make_policy, make_request
from tests.lifecycle_invariants import check_history, check_records, check_state

TRIES = 15


def _race(factory: sessionmaker[Session], actions: list[Callable[[Session], Any]]) -> list[Any]:
    """Run each action in its own thread and session at the same moment; commit each.

    Returns what each returned, or the ServiceError it raised."""
    barrier = threading.Barrier(len(actions))

    def run(action: Callable[[Session], Any]) -> Any:
        with factory() as session:
            barrier.wait(timeout=10)
            try:
                out = action(session)
                session.commit()
                return out
            except ServiceError as exc:
                session.rollback()
                return exc

    with ThreadPoolExecutor(max_workers=len(actions)) as pool:
        return list(pool.map(run, actions))


def _outcomes(results: list[Any]) -> list[str]:
    return sorted(r.code if isinstance(r, ServiceError) else "ok" for r in results)


# The admin keys of the current test (set by the ``factory`` fixture).
AUTHOR = REVIEWER = REVIEWER2 = Actor(0, "")


@pytest.fixture
def factory(session_factory: sessionmaker[Session]) -> sessionmaker[Session]:
    global AUTHOR, REVIEWER, REVIEWER2
    with session_factory() as s:
        AUTHOR, REVIEWER, REVIEWER2 = (
            Actor.of(keys.create_key(s, name, "admin")[0])
            for name in ("author", "reviewer", "reviewer2")
        )
        s.commit()
    return session_factory


def _new_policy(factory: sessionmaker[Session], drafts: int, approved: int, active: int) -> str:
    """A policy named at random with ``drafts`` versions, the first ``approved`` approved and
    the first ``active`` of those activated in turn."""
    name = f"race-{uuid.uuid4().hex[:10]}"
    with factory() as s:
        for v in range(1, drafts + 1):
            lifecycle.submit(s, name, make_policy(name=name), AUTHOR)
            if v <= approved:
                lifecycle.approve(s, name, v, REVIEWER)
        for v in range(1, active + 1):
            lifecycle.activate(s, name, v, AUTHOR, expected_current=v - 1 or None)
        s.commit()
    return name


def _history(factory: sessionmaker[Session], name: str) -> list[PolicyEvent]:
    with factory() as s:
        return list(
            s.scalars(select(PolicyEvent).where(PolicyEvent.name == name).order_by(PolicyEvent.id))
        )


def _statuses(factory: sessionmaker[Session], name: str) -> dict[int, str]:
    """The statuses the service derives, checked against the replayed history, whose
    active and shadow versions the state row must hold."""
    events = _history(factory, name)
    with factory() as s:
        state = policies.get_state(s, name)
        assert state is not None
        check_state(events, state.active_version, state.shadow_version)
        return {v.row.version: v.status for v in policies.version_views(s, name)}


def test_two_approvals_of_one_draft(factory: sessionmaker[Session]) -> None:
    for _ in range(TRIES):
        name = _new_policy(factory, drafts=1, approved=0, active=0)
        results = _race(
            factory,
            [
                lambda s, n=name: lifecycle.approve(s, n, 1, REVIEWER),
                lambda s, n=name: lifecycle.approve(s, n, 1, REVIEWER2),
            ],
        )
        assert _outcomes(results) == ["invalid_transition", "ok"]
        approvals = [e for e in _history(factory, name) if e.action == "approve"]
        assert len(approvals) == 1
        check_history(_history(factory, name), _statuses(factory, name))


def test_two_first_submissions_of_a_new_policy(factory: sessionmaker[Session]) -> None:
    """Both wait on the one state row the first creates: versions 1 and 2, no error."""
    for _ in range(TRIES):
        name = f"race-{uuid.uuid4().hex[:10]}"
        results = _race(
            factory,
            [lambda s, n=name: lifecycle.submit(s, n, make_policy(name=n), AUTHOR)] * 2,
        )
        assert sorted(r.row.version for r in results) == [1, 2], results
        check_history(_history(factory, name), _statuses(factory, name))


def test_two_activations_of_one_version(factory: sessionmaker[Session]) -> None:
    for _ in range(TRIES):
        name = _new_policy(factory, drafts=2, approved=2, active=1)
        results = _race(
            factory,
            [
                lambda s, n=name: lifecycle.activate(s, n, 2, AUTHOR, "go", expected_current=1)
                for _ in range(2)
            ],
        )
        # The second is a repeat of the first: answered the same, nothing changed.
        assert _outcomes(results) == ["ok", "ok"]
        assert [r.row.version for r in results] == [2, 2]
        events = _history(factory, name)
        switches = [(e.from_version, e.to_version) for e in events if e.action == "activate"]
        assert switches == [(None, 1), (1, 2)]
        check_history(events, _statuses(factory, name))


def test_two_activations_of_different_versions(factory: sessionmaker[Session]) -> None:
    """Both expecting v1: the first wins, the second is stale (409 current_changed) and
    changes nothing; the history chains the one switch."""
    for _ in range(TRIES):
        name = _new_policy(factory, drafts=3, approved=3, active=1)
        results = _race(
            factory,
            [
                lambda s, n=name, v=v: lifecycle.activate(s, n, v, AUTHOR, expected_current=1)
                for v in (2, 3)
            ],
        )
        assert _outcomes(results) == ["current_changed", "ok"]
        events = _history(factory, name)
        check_history(events, _statuses(factory, name))
        switches = [(e.from_version, e.to_version) for e in events if e.action == "activate"]
        assert switches[0] == (None, 1) and switches[1][0] == 1 and len(switches) == 2


def test_two_rollbacks_to_one_version(factory: sessionmaker[Session]) -> None:
    for _ in range(TRIES):
        name = _new_policy(factory, drafts=2, approved=2, active=2)
        results = _race(
            factory,
            [
                lambda s, n=name: lifecycle.rollback(
                    s, n, AUTHOR, "too many", to_version=1, expected_current=2
                )
                for _ in range(2)
            ],
        )
        assert _outcomes(results) == ["ok", "ok"]  # the second is a repeat
        assert [e.action for e in _history(factory, name)].count("rollback") == 1
        check_history(_history(factory, name), _statuses(factory, name))


def test_two_identical_rollbacks_with_expected_current(factory: sessionmaker[Session]) -> None:
    """A double click: the second is a repeat, answered with the same version, no change."""
    for _ in range(TRIES):
        name = _new_policy(factory, drafts=3, approved=3, active=3)
        results = _race(
            factory,
            [
                lambda s, n=name: lifecycle.rollback(s, n, AUTHOR, "undo", expected_current=3)
                for _ in range(2)
            ],
        )
        assert [r.row.version for r in results] == [2, 2], results
        events = _history(factory, name)
        assert [e.action for e in events].count("rollback") == 1
        assert _statuses(factory, name) == {1: "retired", 2: "active", 3: "retired"}
        check_history(events, _statuses(factory, name))


def test_two_shadow_designations(factory: sessionmaker[Session]) -> None:
    for _ in range(TRIES):
        name = _new_policy(factory, drafts=2, approved=2, active=1)
        results = _race(
            factory,
            [
                lambda s, n=name: lifecycle.set_shadow(s, n, 2, AUTHOR, expected_current=None)
                for _ in range(2)
            ],
        )
        assert _outcomes(results) == ["ok", "ok"]  # the second is a repeat
        events = _history(factory, name)
        assert [(e.from_version, e.to_version) for e in events if e.action == "shadow"] == [
            (None, 2)
        ]
        check_history(events, _statuses(factory, name))


def test_records_carry_the_version_active_at_their_issued_at(
    engine: Engine, factory: sessionmaker[Session]
) -> None:
    """Scoring from many threads through the group committer, and batches, while another
    thread switches versions and shadows as fast as it can: each record's version (and
    shadow version) is the one the history says was active (designated) at the record's
    issued_at."""
    name = "readmission"
    _new_policy_named(factory, name)
    ctx = ScoringContext(TEST_SECRET.encode(), DocumentCache())
    committer = GroupCommitter(engine, ctx)
    committer.start()
    stop = threading.Event()
    switches = [0]

    def switcher() -> None:
        # v1 active, v2 and v3 approved: cycle activations, rollbacks and shadows.
        steps: list[Callable[[Session], Any]] = [
            lambda s: lifecycle.set_shadow(s, name, 3, AUTHOR, expected_current=None),
            lambda s: lifecycle.rollback(s, name, AUTHOR, "swap", to_version=2, expected_current=1),
            lambda s: lifecycle.clear_shadow(s, name, AUTHOR, expected_current=3),
            lambda s: lifecycle.rollback(
                s, name, AUTHOR, "swap back", to_version=1, expected_current=2
            ),
        ]
        k = 0
        while not stop.is_set() and k < 400:
            with factory() as s:
                steps[k % len(steps)](s)
                s.commit()
            k += 1
        switches[0] = k

    def scorer(tag: int) -> int:
        n = 0
        while not stop.is_set() and n < 600:
            req = RecommendationRequest.model_validate(
                make_request(request_id=f"s{tag}-{n}-{uuid.uuid4().hex[:6]}")
            )
            committer.recommend_blocking(req)
            n += 1
        return n

    def batcher(tag: int) -> int:
        n = 0
        while not stop.is_set() and n < 40:
            items = [
                RecommendationRequest.model_validate(
                    make_request(request_id=f"b{tag}-{n}-{k}-{uuid.uuid4().hex[:6]}")
                )
                for k in range(25)
            ]
            recommend_batch(engine, items, ctx)
            n += 1
        return n * 25

    thread = threading.Thread(target=switcher)
    thread.start()
    with ThreadPoolExecutor(max_workers=10) as pool:
        futures = [pool.submit(scorer, t) for t in range(8)]
        futures += [pool.submit(batcher, t) for t in range(2)]
        thread.join(120)
        stop.set()
        sent = sum(f.result() for f in futures)
    committer.stop()
    assert switches[0] >= 40 and sent > 500

    events = _history(factory, name)
    check_history(events, _statuses(factory, name))
    with factory() as s:
        rows = list(
            s.execute(
                select(
                    Recommendation.request_id,
                    Recommendation.version,
                    Recommendation.shadow_version,
                    Recommendation.issued_at,
                ).where(Recommendation.policy == name)
            )
        )
    assert len(rows) == sent
    check_records(events, rows)


def _new_policy_named(factory: sessionmaker[Session], name: str) -> None:
    with factory() as s:
        for v in (1, 2, 3):
            lifecycle.submit(s, name, make_policy(name=name), AUTHOR)
            lifecycle.approve(s, name, v, REVIEWER)
        lifecycle.activate(s, name, 1, AUTHOR, expected_current=None)
        s.commit()
