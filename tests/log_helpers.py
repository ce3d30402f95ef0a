"""Databases and records for the decision log tests.

``log_db`` runs a test on SQLite and on PostgreSQL: the PostgreSQL database has a random name,
is created for the test and dropped after. Without a server the PostgreSQL case is skipped,
except under ``CI=true``, where it fails.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import Engine, create_engine, text
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from service.settings import Settings
from service.store.db import create_db_engine, create_session_factory
from service.store.models import Base, PolicyVersion
from service.store.records import record_leaf_hash

POSTGRES_URL = os.environ.get(
    "EVENHAND_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)


def _postgres_admin_engine() -> Engine:
    return create_engine(POSTGRES_URL, isolation_level="AUTOCOMMIT", pool_pre_ping=True)


def postgres_unavailable(reason: str) -> None:
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"PostgreSQL is required under CI=true: {reason}")
    pytest.skip(f"PostgreSQL not reachable: {reason}")


def create_postgres_database() -> str:
    """A fresh empty database on the test server; its URL."""
    name = f"evenhand_log_{uuid.uuid4().hex[:12]}"
    admin = _postgres_admin_engine()
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
    except Exception as exc:  # any connection failure means: no server
        postgres_unavailable(str(exc).splitlines()[0])
    finally:
        admin.dispose()
    return make_url(POSTGRES_URL).set(database=name).render_as_string(hide_password=False)


def drop_postgres_database(url: str) -> None:
    name = make_url(url).database
    admin = _postgres_admin_engine()
    try:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    finally:
        admin.dispose()


def database_url(kind: str, tmp_path: Path) -> Iterator[str]:
    if kind == "sqlite":
        yield f"sqlite:///{tmp_path / 'log.db'}"
        return
    url = create_postgres_database()
    try:
        yield url
    finally:
        drop_postgres_database(url)


class LogDb:
    """An engine over a fresh schema, with helpers to add policy versions and records."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.engine = create_db_engine(Settings(database_url=url, draw_secret="test-secret"))
        Base.metadata.create_all(self.engine)
        self.sessions: sessionmaker[Session] = create_session_factory(self.engine)
        self._counter = 0
        with self.sessions() as session:
            session.add(
                PolicyVersion(
                    name="fernhollow",
                    version=1,
                    document={},
                    content_hash="0" * 64,
                    status="active",
                    author="admin-a",
                    approver="admin-b",
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

    def close(self) -> None:
        self.engine.dispose()
