"""Writing and reading decision log records (queries only; no commits).

Rows are derived from :class:`~service.log.records.DecisionRecord`. ``insert_records`` is the
scoring hot path: one ``executemany`` with the values already in the database's own form,
skipping SQLAlchemy's per-row parameter processing (a batch of 5,000 would otherwise spend
most of its time there). The values match what the column types would bind: SQLite stores UTC
datetimes as naive ``YYYY-MM-DD HH:MM:SS.ffffff`` text, JSON as text and UUIDs as 32 hex
digits; PostgreSQL takes aware datetimes, JSON text and UUID text. Reading back through the
models gives the same values (a test compares a row written here with one written through
the model).

``stored_records`` is the one replay look-up: the records already stored for some
request_ids (on PostgreSQL one ``= ANY(array)`` statement, on SQLite ``IN`` lists of up to
1,024 ids).
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import UTC, datetime
from functools import lru_cache
from operator import attrgetter
from typing import Any

from sqlalchemy import Connection, Dialect, Table, bindparam, exc, select

from service.log.records import DecisionRecord, encode_attributes
from service.store.models import Recommendation
from service.store.switch_lock import SCORING_LOCK_SQL

TABLE: Table = Recommendation.__table__  # type: ignore[assignment]
# Every column the scoring path sets; the id is assigned by the database. Each is a field
# of DecisionRecord of the same name.
INSERT_COLUMNS: tuple[str, ...] = tuple(c.name for c in TABLE.columns if c.name != "id")
_VALUES = attrgetter(*INSERT_COLUMNS)
_ATTRIBUTES_AT = INSERT_COLUMNS.index("attributes")
_ISSUED_AT = INSERT_COLUMNS.index("issued_at")
_RECOMMENDATION_ID = INSERT_COLUMNS.index("recommendation_id")
_SQL_CACHE: dict[tuple[str, bool], str] = {}


def _insert_sql(dialect: Dialect, skip_existing: bool = False) -> str:
    sql = _SQL_CACHE.get((dialect.name, skip_existing))
    if sql is None:
        quote = dialect.identifier_preparer.quote
        names = ", ".join(quote(c) for c in INSERT_COLUMNS)
        if dialect.name == "sqlite":
            marks = ", ".join("?" for _ in INSERT_COLUMNS)
        else:
            marks = ", ".join(f"%({c})s" for c in INSERT_COLUMNS)
        sql = f"INSERT INTO {quote(TABLE.name)} ({names}) VALUES ({marks})"
        if skip_existing:
            # SQLite >= 3.24 and PostgreSQL share this syntax.
            sql += " ON CONFLICT (request_id) DO NOTHING"
        _SQL_CACHE[(dialect.name, skip_existing)] = sql
    return sql


SQLITE_ROWS_PER_STATEMENT = 256
"""Rows per multi-row INSERT on SQLite (20 parameters a row, far below SQLite's 32,766)."""
_MULTI_SQL_CACHE: dict[tuple[str, int], str] = {}


def _sqlite_multi_row_sql(dialect: Dialect, count: int) -> str:
    sql = _MULTI_SQL_CACHE.get((dialect.name, count))
    if sql is None:
        head, _, values = _insert_sql(dialect).partition(" VALUES ")
        sql = _MULTI_SQL_CACHE[(dialect.name, count)] = f"{head} VALUES " + ", ".join(
            [values] * count
        )
    return sql


def insert_records(conn: Connection, records: Sequence[DecisionRecord]) -> None:
    """Insert many records (request_ids already checked: a duplicate is an error).

    On SQLite as multi-row INSERTs: the driver runs ``executemany`` one row at a time and
    releases the GIL around each, so a group of rows costs as many thread hand-offs with the
    event loop; one statement per 256 rows costs one.
    """
    if not records:
        return
    if conn.dialect.name == "postgresql" and len(records) >= POSTGRES_COPY_FROM:
        _copy_records(conn, records)
        return
    params = _driver_params(conn.dialect, records)
    if conn.dialect.name != "sqlite":
        conn.exec_driver_sql(_insert_sql(conn.dialect), params)
        return
    for start in range(0, len(params), SQLITE_ROWS_PER_STATEMENT):
        chunk = params[start : start + SQLITE_ROWS_PER_STATEMENT]
        flat = tuple(value for row in chunk for value in row)
        conn.exec_driver_sql(_sqlite_multi_row_sql(conn.dialect, len(chunk)), flat)


POSTGRES_COPY_FROM = 64
"""From this many records on, PostgreSQL takes them by ``COPY ... FROM STDIN`` (psycopg's
``Cursor.copy``), which the server parses and indexes far more cheaply than as many
parameterised INSERTs; fewer go by ``executemany``. Both are plain inserts in the caller's
transaction: a duplicate request_id fails the statement either way, and row triggers fire."""


def _copy_records(conn: Connection, records: Sequence[DecisionRecord]) -> None:
    """``COPY`` on the connection's own driver connection; a driver error is raised as
    SQLAlchemy raises it from a statement (``IntegrityError`` for a duplicate request_id,
    ``OperationalError`` for a lost connection, which marks it for replacement), so the
    callers' retry and unavailability handling see the same exceptions as with INSERT."""
    dialect = conn.dialect
    quote = dialect.identifier_preparer.quote
    names = ", ".join(quote(c) for c in INSERT_COLUMNS)
    statement = f"COPY {quote(TABLE.name)} ({names}) FROM STDIN"
    dbapi_connection = conn.connection.dbapi_connection
    assert dbapi_connection is not None
    cursor = dbapi_connection.cursor()
    try:
        with cursor.copy(statement) as copy:
            for record in records:
                values = list(_VALUES(record))
                values[_ATTRIBUTES_AT] = _attributes_text(record.attributes)
                copy.write_row(values)
    except dialect.loaded_dbapi.Error as error:
        lost = dialect.is_disconnect(error, dbapi_connection, cursor)
        if lost:
            conn.invalidate(error)
        raise exc.DBAPIError.instance(
            statement,
            None,
            error,
            dialect.loaded_dbapi.Error,
            hide_parameters=True,
            connection_invalidated=lost,
            dialect=dialect,
        ) from error
    finally:
        cursor.close()


def insert_new_record(conn: Connection, record: DecisionRecord) -> bool:
    """Insert one record unless its request_id is stored; False when it was."""
    result = conn.exec_driver_sql(
        _insert_sql(conn.dialect, skip_existing=True), _driver_params(conn.dialect, [record])[0]
    )
    return bool(result.rowcount == 1)


def _driver_params(dialect: Dialect, records: Sequence[DecisionRecord]) -> list[Any]:
    if dialect.name == "sqlite":
        stamps: dict[datetime, str] = {}  # a batch shares one issued_at: format it once

        def stamp(value: datetime) -> str:
            text = stamps.get(value)
            if text is None:
                text = stamps[value] = value.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S.%f")
            return text

        params: list[Any] = []
        for record in records:
            values = list(_VALUES(record))
            values[_ATTRIBUTES_AT] = _attributes_text(record.attributes)
            values[_ISSUED_AT] = stamp(record.issued_at)
            # SQLAlchemy's Uuid keeps 32 hex digits on SQLite (a native uuid on PostgreSQL).
            values[_RECOMMENDATION_ID] = record.recommendation_id.replace("-", "")
            params.append(tuple(values))
        return params
    rows = []
    for record in records:
        row = dict(zip(INSERT_COLUMNS, _VALUES(record), strict=True))
        row["attributes"] = _attributes_text(record.attributes)
        rows.append(row)
    return rows


def _attributes_text(attributes: dict[str, Any]) -> str:
    # Keyed with each value's type: 1, 1.0 and True are equal as keys but not as JSON.
    return _attributes_json(tuple((k, type(v), v) for k, v in attributes.items()))


@lru_cache(maxsize=4096)
def _attributes_json(items: tuple[tuple[str, type, Any], ...]) -> str:
    return encode_attributes({k: v for k, _, v in items})


# -- the replay look-up -------------------------------------------------------------------

_STORED = select(
    *[getattr(Recommendation, c) for c in INSERT_COLUMNS if c != "request_fingerprint"],
    Recommendation.request_fingerprint,
).where(Recommendation.request_id.in_(bindparam("ids", expanding=True)))
_PROBE_SQL: dict[tuple[str, int, bool], str] = {}
CHUNK = 1024
"""request_ids per look-up statement."""


def stored_records(
    conn: Connection, request_ids: Sequence[str], lock: bool = False
) -> dict[str, DecisionRecord]:
    """The records stored for any of ``request_ids``, by request_id (each with its request's
    fingerprint).

    First a plain statement on the driver says which ids are stored (most requests are new,
    so the typed read runs only for the ones found). ``lock``: take the switch lock for
    scoring with it; on PostgreSQL the lock rides on the first statement (one round trip
    for both), and the statements after it read with snapshots taken after it was granted.
    """
    found: list[str] = []
    if conn.dialect.name == "postgresql" and request_ids:
        found = _probe_array(conn, request_ids, lock)
    else:
        for start in range(0, len(request_ids), CHUNK):
            found += _probe(conn, request_ids[start : start + CHUNK], lock and start == 0)
    if not request_ids and lock and conn.dialect.name == "postgresql":
        conn.exec_driver_sql(SCORING_LOCK_SQL)
    records: dict[str, DecisionRecord] = {}
    for start in range(0, len(found), CHUNK):
        for row in conn.execute(_STORED, {"ids": found[start : start + CHUNK]}):
            records[row.request_id] = DecisionRecord.from_stored(
                row, bytes(row.request_fingerprint)
            )
    return records


_ARRAY_PROBE = "SELECT request_id FROM recommendations WHERE request_id = ANY(%s)"
_ARRAY_PROBE_LOCKED = (
    f"{_ARRAY_PROBE} UNION ALL SELECT NULL FROM ({SCORING_LOCK_SQL}) AS switch_lock"
)


def _probe_array(conn: Connection, ids: Sequence[str], lock: bool) -> list[str]:
    """PostgreSQL: every id in one statement, as one array parameter (one round trip and one
    plan for any number of ids, read through the unique index on request_id)."""
    sql = _ARRAY_PROBE_LOCKED if lock else _ARRAY_PROBE
    return [row[0] for row in conn.exec_driver_sql(sql, (list(ids),)) if row[0] is not None]


def _probe(conn: Connection, ids: Sequence[str], lock: bool) -> list[str]:
    # Padded to a power of two (repeating the first id), so few statements are ever built.
    size = 1 << (len(ids) - 1).bit_length()
    dialect = conn.dialect
    lock = lock and dialect.name == "postgresql"
    key = (dialect.name, size, lock)
    sql = _PROBE_SQL.get(key)
    if sql is None:
        mark = "?" if dialect.paramstyle == "qmark" else "%s"
        sql = (
            "SELECT request_id FROM recommendations WHERE request_id IN "
            f"({', '.join([mark] * size)})"
        )
        if lock:
            sql += f" UNION ALL SELECT NULL FROM ({SCORING_LOCK_SQL}) AS switch_lock"
        _PROBE_SQL[key] = sql
    padded = tuple(ids) + (ids[0],) * (size - len(ids))
    return [row[0] for row in conn.exec_driver_sql(sql, padded) if row[0] is not None]
