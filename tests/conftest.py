"""Shared fixtures: a migrated database on SQLite and on PostgreSQL, an app and its client.

Every test that takes ``database_url`` (directly or through ``engine``/``client``) runs once
per backend. The PostgreSQL database is created under a random name on the server at
``EVENHAND_TEST_POSTGRES_URL`` for this run and dropped at the end; when the server cannot be
reached the PostgreSQL half is skipped locally and FAILS under ``CI=true``.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, create_engine, text
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from service.settings import Settings
from service.store.db import create_db_engine, create_session_factory
from service.store.migrate import upgrade
from tests.helpers import TEST_SECRET, TEST_SIGNING_KEY, create_key
from tests.insert_only import allow_migrations, changes_allowed

# Every app, CLI command and server the tests start signs the log with the test key (the
# tests of a missing key remove it).
os.environ.setdefault("EVENHAND_SIGNING_KEY", TEST_SIGNING_KEY)
allow_migrations()

DEFAULT_PG = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
BACKENDS = ["sqlite", "postgresql"]


def _postgres_server_url() -> str:
    return os.environ.get("EVENHAND_TEST_POSTGRES_URL", DEFAULT_PG)


def _in_ci() -> bool:
    return os.environ.get("CI", "").lower() in {"1", "true", "yes"}


def _create_postgres_database() -> tuple[str, Callable[[], None]]:
    server = make_url(_postgres_server_url())
    name = f"evenhand_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(server, isolation_level="AUTOCOMMIT", pool_pre_ping=True)
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
    except Exception as exc:  # the server is missing or refuses us
        admin.dispose()
        message = f"PostgreSQL at {server.render_as_string(True)} is unreachable: {exc}"
        if _in_ci():
            pytest.fail(message + " (CI=true: PostgreSQL tests are mandatory)")
        pytest.skip(message)

    def drop() -> None:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()

    return server.set(database=name).render_as_string(hide_password=False), drop


@pytest.fixture(scope="session", params=BACKENDS)
def database_url(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[str]:
    """A freshly migrated database (one per backend per run)."""
    if request.param == "sqlite":
        path: Path = tmp_path_factory.mktemp("sqlite") / "evenhand.db"
        url = f"sqlite:///{path}"
        with changes_allowed():
            upgrade(url)
        yield url
        return
    url, drop = _create_postgres_database()
    try:
        with changes_allowed():
            upgrade(url)
        yield url
    finally:
        drop()


@pytest.fixture
def settings(database_url: str) -> Settings:
    # No periodic sealing by the apps the tests start: a test seals when it chooses (a
    # background round would take the upkeep lock and seal a test's records first). The
    # sealer's own tests start one with a short interval.
    return Settings(
        database_url=database_url,
        draw_secret=TEST_SECRET,  # type: ignore[arg-type]
        seal_interval_seconds=3600,
    )


@pytest.fixture(scope="session")
def _session_engine(database_url: str) -> Iterator[Engine]:
    engine = create_db_engine(Settings(database_url=database_url))
    yield engine
    engine.dispose()


_TABLES: dict[str, list[str]] = {}


def _empty_all_tables(engine: Engine) -> None:
    from sqlalchemy import MetaData

    key = engine.url.render_as_string(hide_password=False)
    if key not in _TABLES:  # the schema does not change during a run: reflect it once
        meta = MetaData()
        meta.reflect(engine)
        _TABLES[key] = [t.name for t in reversed(meta.sorted_tables) if t.name != "alembic_version"]
    tables = _TABLES[key]
    with engine.begin() as conn:
        if engine.dialect.name == "postgresql":
            # The log's tables refuse TRUNCATE (migration 0080): triggers off for the cleanup.
            conn.execute(text("SET LOCAL session_replication_role = replica"))
            if tables:
                names = ", ".join(f'"{t}"' for t in tables)
                conn.execute(text(f"TRUNCATE {names} RESTART IDENTITY CASCADE"))
        else:
            for table in tables:
                conn.execute(text(f'DELETE FROM "{table}"'))
            has_seq = conn.execute(
                text("SELECT name FROM sqlite_master WHERE name = 'sqlite_sequence'")
            ).first()
            if has_seq:
                conn.execute(text("DELETE FROM sqlite_sequence"))


@pytest.fixture
def engine(_session_engine: Engine) -> Iterator[Engine]:
    """The migrated database, emptied after each test."""
    yield _session_engine
    with changes_allowed():
        _empty_all_tables(_session_engine)


@pytest.fixture
def session_factory(engine: Engine) -> sessionmaker[Session]:
    return create_session_factory(engine)


@pytest.fixture
def client(settings: Settings, engine: Engine) -> Iterator[TestClient]:
    from service.app import create_app

    with TestClient(create_app(settings)) as test_client:
        yield test_client


@pytest.fixture
def make_key(session_factory: sessionmaker[Session]) -> Callable[..., str]:
    """``make_key("admin")`` -> a bearer token of a new key with that role."""

    def make(role: str, name: str | None = None) -> str:
        return create_key(session_factory, role, name)

    return make


@pytest.fixture
def tokens(make_key: Callable[..., str]) -> dict[str, str]:
    """One key per role, plus a second admin (four-eyes approvals)."""
    return {
        "admin": make_key("admin", "admin-author"),
        "admin2": make_key("admin", "admin-approver"),
        "scoring": make_key("scoring", "scorer"),
        "audit": make_key("audit", "auditor"),
    }


@pytest.fixture
def publish(client: TestClient, tokens: dict[str, str]) -> Callable[..., int]:
    """``publish(doc)`` submits, approves (second admin) and activates; returns the version."""
    from tests.helpers import bearer

    def run(document: dict[str, object] | None = None, activate: bool = True) -> int:
        from tests.helpers import make_policy

        doc = document if document is not None else make_policy()
        name = doc["name"]
        r = client.post(f"/v1/policies/{name}/versions", json=doc, headers=bearer(tokens["admin"]))
        assert r.status_code == 201, r.text
        version = int(r.json()["version"])
        r = client.post(
            f"/v1/policies/{name}/versions/{version}/approve", headers=bearer(tokens["admin2"])
        )
        assert r.status_code == 200, r.text
        if activate:
            listed = client.get("/v1/policies", headers=bearer(tokens["admin"])).json()
            current = next(p["active_version"] for p in listed if p["name"] == name)
            r = client.post(
                f"/v1/policies/{name}/activate",
                json={"version": version, "expected_current": current},
                headers=bearer(tokens["admin"]),
            )
            assert r.status_code == 200, r.text
        return version

    return run
