"""Records for the decision log tests, on the migrated databases of ``tests/conftest.py``."""

from __future__ import annotations

import uuid
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import Engine, text
from sqlalchemy.orm import Session, sessionmaker

from service.log.records import record_leaf_hash
from service.store.db import create_session_factory
from service.store.models import PolicyVersion


class LogDb:
    """An emptied migrated database with one policy version, and helpers to add records."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.sessions: sessionmaker[Session] = create_session_factory(engine)
        self._counter = 0
        with self.sessions() as session:
            session.add(
                PolicyVersion(
                    name="fernhollow",
                    version=1,
                    document={},
                    content_hash="0" * 64,
                    author="admin-a",
                )
            )
            session.commit()

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def record_values(self, **overrides: Any) -> dict[str, Any]:
        self._counter += 1
        n = self._counter
        values: dict[str, Any] = {
            "recommendation_id": str(uuid.UUID(int=n)),
            "request_id": f"req-{n}",
            "request_fingerprint": "f" * 64,
            "case_id": f"FCH-{n:07d}",
            "policy": "fernhollow",
            "version": 1,
            "score": round(0.01 * (n % 97), 4),
            "attributes": {"community": "millbrook", "language": "es"},
            "group": "millbrook|es",
            "rule": "millbrook|es",
            "probability": 0.5 if n % 3 else 1.0,
            "draw": (n * 0.6180339887) % 1.0,
            "action": n % 2 == 0,
            "action_label": "offer nurse follow-up" if n % 2 == 0 else "standard discharge",
            "issued_at": datetime(2026, 10, 1, tzinfo=UTC) + timedelta(seconds=17 * n),
            "shadow_version": None,
            "shadow_probability": None,
            "shadow_action": None,
        }
        values.update(overrides)
        values["record_hash"] = record_leaf_hash(values)
        return values

    def add_records(self, session: Session, count: int) -> list[int]:
        from service.store.models import Recommendation

        rows = [Recommendation(**self.record_values()) for _ in range(count)]
        session.add_all(rows)
        session.flush()
        return [r.id for r in rows]

    def insert_records(self, count: int) -> list[int]:
        with self.sessions() as session:
            ids = self.add_records(session, count)
            session.commit()
        return ids

    def sql(self, statement: str, **params: Any) -> Any:
        """Raw SQL outside the application's code paths, as someone tampering would."""
        with self.engine.begin() as conn:
            return conn.execute(text(statement), params)
