"""Engine and session factories.

SQLite gets WAL (readers never block the writer), foreign keys, a busy timeout and the
configured ``synchronous`` level on every new connection. Transactions on SQLite start with
``BEGIN IMMEDIATE``: a scoring request reads the active version and then writes, and a
deferred transaction that read before another writer committed could not upgrade to a write
lock (SQLITE_BUSY_SNAPSHOT, not retried by the busy timeout). Taking the write lock up front
makes concurrent writers queue on the busy timeout instead of failing.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from service.settings import Settings


def is_sqlite(url: str) -> bool:
    return make_url(url).get_backend_name() == "sqlite"


def create_db_engine(settings: Settings) -> Engine:
    url = settings.database_url
    if is_sqlite(url):
        engine = create_engine(
            url,
            connect_args={
                "check_same_thread": False,
                "timeout": settings.sqlite_busy_timeout_ms / 1000,
            },
            pool_size=20,
            max_overflow=20,
        )
        _configure_sqlite(engine, settings)
        return engine
    return create_engine(url, pool_size=10, max_overflow=20, pool_pre_ping=True)


def _configure_sqlite(engine: Engine, settings: Settings) -> None:
    synchronous = settings.sqlite_synchronous
    busy_ms = settings.sqlite_busy_timeout_ms

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        # Let SQLAlchemy's "begin" event emit BEGIN itself (the driver's own BEGIN is deferred).
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.execute(f"PRAGMA busy_timeout={int(busy_ms)}")
        cursor.execute(f"PRAGMA synchronous={synchronous}")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(connection: Any) -> None:
        connection.exec_driver_sql("BEGIN IMMEDIATE")


def create_session_factory(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(bind=engine, expire_on_commit=False, autoflush=False)
