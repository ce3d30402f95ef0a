"""Small helpers for test data, shared by every test module."""

from __future__ import annotations

import copy
import hashlib
import uuid
from typing import TYPE_CHECKING, Any

from sqlalchemy.orm import Session, sessionmaker

from service.store import keys

if TYPE_CHECKING:
    from service.store.scoring import ScoringContext

TEST_SECRET = "test-draw-secret-not-for-production"
# An Ed25519 seed for the tests only (SHA-256 of a fixed phrase, so it is not a weak seed).
TEST_SIGNING_KEY = hashlib.sha256(b"evenhand test signing key, never for production").hexdigest()

_BASE_POLICY: dict[str, Any] = {
    "name": "readmission",
    "description": "test policy",
    "score_meaning": "P(readmission within 30 days)",
    "score_range": [0.0, 1.0],
    "action_label": "offer follow-up",
    "no_action_label": "standard discharge",
    "favourable": "action",
    "costs": {"false_positive": 1.0, "false_negative": 4.0},
    "groups": {
        "attributes": ["region"],
        "known": ["north", "south"],
        "fallback": {"unknown_groups": "refuse"},
    },
    "rules": {
        "north": {"steps": [{"from": 0.3, "probability": 1.0}]},
        "south": {"steps": [{"from": 0.2, "probability": 0.5}, {"from": 0.4, "probability": 1.0}]},
    },
}


def make_policy(**overrides: Any) -> dict[str, Any]:
    """A valid policy document (JSON data); top-level keys can be replaced."""
    doc = copy.deepcopy(_BASE_POLICY)
    doc.update(copy.deepcopy(overrides))
    return doc


def create_key(factory: sessionmaker[Session], role: str, name: str | None = None) -> str:
    """Create an API key directly in the database and return its token."""
    with factory() as session:
        _, token = keys.create_key(session, name or f"{role}-{uuid.uuid4().hex[:8]}", role)
        session.commit()
    return token


def actor(factory: sessionmaker[Session], name: str) -> keys.Actor:
    """The :class:`~service.store.keys.Actor` of the key named ``name``."""
    from sqlalchemy import select

    from service.store.models import ApiKey

    with factory() as session:
        return keys.Actor.of(session.scalars(select(ApiKey).where(ApiKey.name == name)).one())


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def make_request(**overrides: Any) -> dict[str, Any]:
    """A valid scoring request body for :func:`make_policy`'s policy."""
    body: dict[str, Any] = {
        "request_id": f"req-{uuid.uuid4().hex}",
        "case_id": f"case-{uuid.uuid4().hex[:10]}",
        "policy": "readmission",
        "score": 0.5,
        "attributes": {"region": "north"},
    }
    body.update(overrides)
    return body


def count_rows(factory: sessionmaker[Session], table: str) -> int:
    from sqlalchemy import text

    with factory() as session:
        return int(session.execute(text(f"SELECT COUNT(*) FROM {table}")).scalar_one())


def live_scoring_context(factory: sessionmaker[Session]) -> ScoringContext:
    """Policy "readmission" (``make_policy()``) submitted, approved by a second admin and
    active; the store's scoring context with ``TEST_SECRET``."""
    from service.store import lifecycle
    from service.store.scoring import DocumentCache, ScoringContext

    with factory() as s:
        author = keys.Actor.of(keys.create_key(s, "author", "admin")[0])
        reviewer = keys.Actor.of(keys.create_key(s, "reviewer", "admin")[0])
        lifecycle.submit(s, "readmission", make_policy(), author)
        lifecycle.approve(s, "readmission", 1, reviewer)
        lifecycle.activate(s, "readmission", 1, author, expected_current=None)
        s.commit()
    return ScoringContext(TEST_SECRET.encode(), DocumentCache())
