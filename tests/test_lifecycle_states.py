"""Arbitrary sequences of lifecycle actions and scoring against a model of the lifecycle.

A hypothesis state machine submits, approves (with the author's key too: four-eyes),
activates, rolls back, designates and ends shadows (with the state the caller expects: the
current one, repeats and stale requests) and scores in between, on a fresh policy per
example. Each step's outcome (the result or the error code) must be the model's, and after
each step:

- the derived statuses are the model's, the state row holds the model's active and shadow
  versions, and at most one version is active;
- the history replays without an impossible transition and ends in the stored statuses;
- every decision names the version active, and the shadow designated, at its issued_at.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import (
    RuleBasedStateMachine,
    initialize,
    invariant,
    rule,
    run_state_machine_as_test,
)
from sqlalchemy import Engine, select
from sqlalchemy.orm import Session, sessionmaker

from service.api.recommendation_schemas import RecommendationRequest
from service.errors import ServiceError
from service.store import keys, lifecycle, policies
from service.store.keys import Actor
from service.store.models import PolicyEvent, Recommendation
from service.store.scoring import DocumentCache, ScoringContext, recommend_group
from tests.helpers import TEST_SECRET, make_policy, make_request
from tests.lifecycle_invariants import check_history, check_records, check_state

pytestmark = pytest.mark.slow

# A version: mostly one in the state the action needs, else any, sometimes an unknown one.
PICKS = st.integers(min_value=0, max_value=7)
# What the caller says it expects: what is current, what was current before the last change
# (a repeat or a stale request), none, or any version.
EXPECTATIONS = st.sampled_from(["current", "current", "current", "previous", None, 1, 2])


@dataclass
class Model:
    statuses: dict[int, str] = field(default_factory=dict)
    active: int | None = None
    shadow: int | None = None
    switches: list[tuple[str, int | None, int]] = field(default_factory=list)
    shadow_changes: list[tuple[str, int | None, int | None]] = field(default_factory=list)

    def switch(self, action: str, to: int) -> None:
        if self.shadow == to:
            self.shadow_changes.append(("unshadow", to, None))
            self.shadow = None
        if self.active is not None:
            self.statuses[self.active] = "retired"
        self.switches.append((action, self.active, to))
        self.statuses[to] = "active"
        self.active = to


def _expected(choice: Any, current: int | None, changes: list[Any]) -> int | None:
    if choice == "current":
        return current
    if choice == "previous":
        return changes[-1][1] if changes else None
    return choice  # type: ignore[no-any-return]


class LifecycleMachine(RuleBasedStateMachine):
    factory: sessionmaker[Session]
    engine: Engine
    ctx: ScoringContext
    author: Actor
    reviewer: Actor

    def __init__(self) -> None:
        super().__init__()
        self.name = f"sm-{uuid.uuid4().hex[:10]}"
        self.model = Model()

    # -- helpers ---------------------------------------------------------------------------

    def _do(self, action: Callable[[Session], Any]) -> Any:
        with self.factory() as session:
            try:
                out = action(session)
                session.commit()
                return out
            except ServiceError as exc:
                session.rollback()
                return exc

    def _pick(self, pick: int, *wanted: str) -> int:
        numbers = sorted(self.model.statuses, reverse=True)
        fitting = [v for v in numbers if self.model.statuses[v] in wanted]
        if pick < 5 and fitting:
            return fitting[pick % len(fitting)]
        if pick < 7 and numbers:
            return numbers[pick % len(numbers)]
        return len(numbers) + 1

    def _expect_code(self, out: Any, code: str | None) -> None:
        got = out.code if isinstance(out, ServiceError) else None
        assert got == code, f"expected {code or 'success'}, got {got or out!r}"

    # -- rules -----------------------------------------------------------------------------

    @rule()
    def submit(self) -> None:
        out = self._do(
            lambda s: lifecycle.submit(s, self.name, make_policy(name=self.name), self.author)
        )
        self._expect_code(out, None)
        number = len(self.model.statuses) + 1
        assert out.row.version == number
        self.model.statuses[number] = "draft"

    @initialize()
    def first_draft(self) -> None:
        self.submit()

    @rule(pick=PICKS, own=st.booleans())
    def approve(self, pick: int, own: bool) -> None:
        version = self._pick(pick, "draft")
        approver = self.author if own else self.reviewer
        out = self._do(lambda s: lifecycle.approve(s, self.name, version, approver))
        m = self.model
        if not m.statuses:
            self._expect_code(out, "unknown_policy")
        elif version not in m.statuses:
            self._expect_code(out, "unknown_version")
        elif m.statuses[version] != "draft":
            self._expect_code(out, "invalid_transition")
        elif own:
            self._expect_code(out, "four_eyes")  # every version is submitted by the author
        else:
            self._expect_code(out, None)
            m.statuses[version] = "approved"

    @rule(pick=PICKS, choice=EXPECTATIONS)
    def activate(self, pick: int, choice: Any) -> None:
        version = self._pick(pick, "approved")
        m = self.model
        expected = _expected(choice, m.active, m.switches)
        out = self._do(
            lambda s: lifecycle.activate(
                s, self.name, version, self.author, "step", expected_current=expected
            )
        )
        if not m.statuses:
            self._expect_code(out, "unknown_policy")
        elif version not in m.statuses:
            self._expect_code(out, "unknown_version")
        elif expected != m.active:
            last = m.switches[-1] if m.switches else None
            if version == m.active and last == ("activate", expected, version):
                self._expect_code(out, None)  # a repeat: nothing changes
                assert out.row.version == version
            else:
                self._expect_code(out, "current_changed")
                assert out.details[0]["value"] == m.active
        elif m.statuses[version] != "approved":
            self._expect_code(out, "invalid_transition")
        else:
            self._expect_code(out, None)
            m.switch("activate", version)

    @rule(to_pick=st.one_of(st.none(), PICKS), choice=EXPECTATIONS)
    def rollback(self, to_pick: int | None, choice: Any) -> None:
        to = None if to_pick is None else self._pick(to_pick, "approved", "retired")
        m = self.model
        expected = _expected(choice, m.active, m.switches)
        out = self._do(
            lambda s: lifecycle.rollback(
                s, self.name, self.author, "undo", to_version=to, expected_current=expected
            )
        )
        if not m.statuses:
            self._expect_code(out, "unknown_policy")
            return
        if expected != m.active:
            last = m.switches[-1] if m.switches else None
            if (
                m.active is not None
                and to in (None, m.active)
                and last == ("rollback", expected, m.active)
            ):
                self._expect_code(out, None)  # a repeat
                assert out.row.version == m.active
            else:
                self._expect_code(out, "current_changed")
            return
        if m.active is None:
            self._expect_code(out, "no_active_version")
            return
        target = to
        if target is None:
            came = [f for _, f, t in m.switches if t == m.active]
            if not came or came[-1] is None:
                self._expect_code(out, "nothing_to_roll_back_to")
                return
            target = came[-1]
        if target not in m.statuses:
            self._expect_code(out, "unknown_version")
        elif target == m.active or m.statuses[target] not in ("approved", "retired"):
            self._expect_code(out, "invalid_transition")
        else:
            self._expect_code(out, None)
            m.switch("rollback", target)

    @rule(pick=PICKS, choice=EXPECTATIONS)
    def set_shadow(self, pick: int, choice: Any) -> None:
        version = self._pick(pick, "approved")
        m = self.model
        expected = _expected(choice, m.shadow, m.shadow_changes)
        out = self._do(
            lambda s: lifecycle.set_shadow(
                s, self.name, version, self.author, expected_current=expected
            )
        )
        last = m.shadow_changes[-1] if m.shadow_changes else None
        if not m.statuses:
            self._expect_code(out, "unknown_policy")
        elif version not in m.statuses:
            self._expect_code(out, "unknown_version")
        elif expected != m.shadow:
            if m.shadow == version and last == ("shadow", expected, version):
                self._expect_code(out, None)
                assert out.version == version
            else:
                self._expect_code(out, "current_changed")
        elif m.shadow == version or m.statuses[version] != "approved":
            self._expect_code(out, "invalid_transition")
        else:
            self._expect_code(out, None)
            m.shadow_changes.append(("shadow", m.shadow, version))
            m.shadow = version

    @rule(choice=EXPECTATIONS)
    def clear_shadow(self, choice: Any) -> None:
        m = self.model
        expected = _expected(choice, m.shadow, m.shadow_changes)
        out = self._do(
            lambda s: lifecycle.clear_shadow(s, self.name, self.author, expected_current=expected)
        )
        last = m.shadow_changes[-1] if m.shadow_changes else None
        if not m.statuses:
            self._expect_code(out, "unknown_policy")
        elif expected != m.shadow:
            if m.shadow is None and last is not None and last[:2] == ("unshadow", expected):
                self._expect_code(out, None)
            else:
                self._expect_code(out, "current_changed")
        elif m.shadow is None:
            self._expect_code(out, "no_shadow")
        else:
            self._expect_code(out, None)
            m.shadow_changes.append(("unshadow", m.shadow, None))
            m.shadow = None

    @rule(count=st.integers(min_value=1, max_value=4))
    def score(self, count: int) -> None:
        reqs = [
            RecommendationRequest.model_validate(
                make_request(policy=self.name, request_id=f"{self.name}-{uuid.uuid4().hex}")
            )
            for _ in range(count)
        ]
        with self.engine.connect() as conn, conn.begin():
            results = recommend_group(conn, reqs, self.ctx)
        m = self.model
        for result in results:
            if not m.statuses:
                assert isinstance(result, ServiceError) and result.code == "unknown_policy"
            elif m.active is None:
                assert isinstance(result, ServiceError) and result.code == "no_active_version"
            else:
                assert not isinstance(result, BaseException), result
                assert result[1] is True

    # -- invariants ------------------------------------------------------------------------

    @invariant()
    def stored_state_is_the_model_and_the_history_replays(self) -> None:
        with self.factory() as s:
            statuses = {v.row.version: v.status for v in policies.version_views(s, self.name)}
            events = list(
                s.scalars(
                    select(PolicyEvent)
                    .where(PolicyEvent.name == self.name)
                    .order_by(PolicyEvent.id)
                )
            )
            records = list(
                s.execute(
                    select(
                        Recommendation.request_id,
                        Recommendation.version,
                        Recommendation.shadow_version,
                        Recommendation.issued_at,
                    ).where(Recommendation.policy == self.name)
                )
            )
            state = policies.get_state(s, self.name)
        assert statuses == self.model.statuses
        active, shadow = (
            (None, None) if state is None else (state.active_version, state.shadow_version)
        )
        assert (active, shadow) == (self.model.active, self.model.shadow)
        check_history(events, statuses)
        check_state(events, active, shadow)
        check_records(events, records)


def test_any_sequence_of_lifecycle_actions_keeps_the_invariants(
    engine: Engine, session_factory: sessionmaker[Session]
) -> None:
    with session_factory() as s:
        author = Actor.of(keys.create_key(s, "author", "admin")[0])
        reviewer = Actor.of(keys.create_key(s, "reviewer", "admin")[0])
        s.commit()

    class Machine(LifecycleMachine):
        pass

    Machine.author, Machine.reviewer = author, reviewer
    Machine.factory = session_factory
    Machine.engine = engine
    Machine.ctx = ScoringContext(TEST_SECRET.encode(), DocumentCache())
    run_state_machine_as_test(
        Machine,
        settings=settings(
            max_examples=30,
            stateful_step_count=30,
            deadline=None,
            suppress_health_check=[HealthCheck.too_slow],
        ),
    )
