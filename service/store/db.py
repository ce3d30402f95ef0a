"""Engine and session factories.

SQLite gets WAL (readers never block the writer), foreign keys, a busy timeout and the
configured ``synchronous`` level on every new connection. Transactions on SQLite start with
``BEGIN IMMEDIATE``: a scoring request reads the active version and then writes, and a
deferred transaction that read before another writer committed could not upgrade to a write
lock (SQLITE_BUSY_SNAPSHOT, not retried by the busy timeout). Taking the write lock up front
makes concurrent writers queue instead of failing.

Within one process the queue is a plain mutex held from BEGIN to the end of COMMIT or
ROLLBACK: SQLite allows one writer at a time anyway, and threads waiting on a mutex are woken
at once, where SQLite's busy handler polls with growing sleeps (requests then stall for
seconds under load). Across processes the busy timeout still applies. A transaction that
only reads can say so with :func:`begin_read_only` (a deferred BEGIN: a WAL snapshot, no
lock). A thread must not open a second write transaction while it holds one (the mutex is
not re-entrant; after the busy timeout the second gets a 503). PostgreSQL takes no such
lock: its transactions run concurrently.
"""

from __future__ import annotations

import json
import sqlite3
import threading
from typing import Any

from sqlalchemy import Engine, create_engine, event, exc
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from service.errors import ServiceUnavailable
from service.settings import Settings

READ_ONLY = "evenhand_read_only"
"""Execution option: this transaction only reads (SQLite: deferred BEGIN, no write lock)."""


def begin_read_only(session: Session) -> None:
    """Start the session's transaction as a read-only one; call before its first query."""
    session.connection(execution_options={READ_ONLY: True})


def is_sqlite(url: str) -> bool:
    return make_url(url).get_backend_name() == "sqlite"


def is_unavailable(error: BaseException) -> bool:
    """True when ``error`` says the database cannot serve us right now, whatever the request:
    the connection was lost or refused (a restart, ``pg_terminate_backend``, a network
    failure), the server is starting or shutting down, a lock or statement timed out, a
    deadlock or serialization failure, the pool had no connection to give. Such errors
    become 503 ``database_unavailable``; any other database error is a fault of one request
    (or of ours)."""
    if isinstance(error, exc.DBAPIError):
        return error.connection_invalidated or isinstance(
            error, exc.OperationalError | exc.InterfaceError
        )
    return isinstance(error, exc.DisconnectionError | exc.TimeoutError)


class DatabaseUnavailable(ServiceUnavailable):
    code = "database_unavailable"

    def __init__(self) -> None:
        super().__init__(
            "the database is unavailable right now; retry in a few seconds. A request cut off "
            "by the outage may have been recorded: repeating it is safe (a recommendation by "
            "its request_id, a policy change with expected_current)"
        )


_JSON = json.JSONEncoder(separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def _json_serializer(value: Any) -> str:
    # One shared compact encoder for JSON columns (json.dumps would build one per value).
    return _JSON.encode(value)


def create_db_engine(settings: Settings) -> Engine:
    url = settings.database_url
    if is_sqlite(url):
        engine = create_engine(
            url,
            connect_args={
                "check_same_thread": False,
                "timeout": settings.sqlite_busy_timeout_ms / 1000,
                "factory": _serialized_connection_class(),
            },
            pool_size=20,
            max_overflow=20,
            json_serializer=_json_serializer,
        )
        _configure_sqlite(engine, settings)
        return engine
    # pre-ping: a pooled connection that died (a server restart) is replaced at checkout.
    # connect_timeout: an unreachable server fails a request in seconds, not minutes.
    connect_args = {} if "connect_timeout" in make_url(url).query else {"connect_timeout": 5}
    return create_engine(
        url,
        pool_size=10,
        max_overflow=20,
        pool_pre_ping=True,
        pool_timeout=10,
        connect_args=connect_args,
        json_serializer=_json_serializer,
    )


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
        # 64 MiB page cache: the log's unique indexes take random keys (UUIDs).
        cursor.execute("PRAGMA cache_size=-65536")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(connection: Any) -> None:
        if connection.get_execution_options().get(READ_ONLY):
            connection.exec_driver_sql("BEGIN")  # deferred: a snapshot read, no lock
            return
        dbapi_connection = connection.connection.dbapi_connection
        dbapi_connection.acquire_write_lock(busy_ms / 1000)
        try:
            connection.exec_driver_sql("BEGIN IMMEDIATE")
        except BaseException:
            dbapi_connection.release_write_lock()
            raise


def _serialized_connection_class() -> type[sqlite3.Connection]:
    """A sqlite3 connection class whose instances share one in-process write mutex."""
    lock = threading.Lock()

    class SerializedConnection(sqlite3.Connection):
        _holds_lock = False

        def acquire_write_lock(self, timeout: float) -> None:
            if not lock.acquire(timeout=timeout if timeout > 0 else -1):
                raise ServiceUnavailable(
                    f"the database stayed busy for {timeout:g} s "
                    "(EVENHAND_SQLITE_BUSY_TIMEOUT_MS); retry",
                    code="database_busy",
                )
            self._holds_lock = True

        def release_write_lock(self) -> None:
            if self._holds_lock:
                self._holds_lock = False
                lock.release()

        def commit(self) -> None:
            try:
                super().commit()
            finally:
                self.release_write_lock()

        def rollback(self) -> None:
            try:
                super().rollback()
            finally:
                self.release_write_lock()

        def close(self) -> None:
            try:
                super().close()
            finally:
                self.release_write_lock()

    return SerializedConnection


def create_session_factory(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(bind=engine, expire_on_commit=False, autoflush=False)
