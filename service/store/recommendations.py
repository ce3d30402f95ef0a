"""Writing and reading decision log records (queries only; no commits).

``insert_records`` is the scoring hot path: one ``executemany`` with the values already in
the database's own form, skipping SQLAlchemy's per-row parameter processing (a batch of
5,000 would otherwise spend most of its time there). The values match what the column types
would bind: SQLite stores UTC datetimes as naive ``YYYY-MM-DD HH:MM:SS.ffffff`` text, JSON
as text and UUIDs as 32 hex digits; PostgreSQL takes aware datetimes, JSON text and UUID
text. Reading back through the models gives the same values (a test compares a row written
here with one written through the model).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from datetime import UTC, datetime
from operator import itemgetter
from typing import Any

from sqlalchemy import Connection, Dialect, Table

from service.store.models import Recommendation

TABLE: Table = Recommendation.__table__  # type: ignore[assignment]
# Every column the scoring path sets; the id is assigned by the database.
INSERT_COLUMNS: tuple[str, ...] = tuple(c.name for c in TABLE.columns if c.name != "id")
_JSON = json.JSONEncoder(separators=(",", ":"), ensure_ascii=False, allow_nan=False)
ATTRIBUTES_JSON = "_attributes_json"
"""Optional row key: the attributes already encoded (the JSON column's text)."""
_GET_ROW = itemgetter(*INSERT_COLUMNS)
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


def insert_records(conn: Connection, rows: Sequence[dict[str, Any]]) -> None:
    """Insert many records (request_ids already checked: a duplicate is an error).

    On SQLite as multi-row INSERTs: the driver runs ``executemany`` one row at a time and
    releases the GIL around each, so a group of rows costs as many thread hand-offs with the
    event loop; one statement per 256 rows costs one.
    """
    if not rows:
        return
    params = _driver_params(conn.dialect, rows)
    if conn.dialect.name != "sqlite":
        conn.exec_driver_sql(_insert_sql(conn.dialect), params)
        return
    for start in range(0, len(params), SQLITE_ROWS_PER_STATEMENT):
        chunk = params[start : start + SQLITE_ROWS_PER_STATEMENT]
        flat = tuple(value for row in chunk for value in row)
        conn.exec_driver_sql(_sqlite_multi_row_sql(conn.dialect, len(chunk)), flat)


def insert_new_record(conn: Connection, row: dict[str, Any]) -> bool:
    """Insert one record unless its request_id is stored; False when it was."""
    result = conn.exec_driver_sql(
        _insert_sql(conn.dialect, skip_existing=True), _driver_params(conn.dialect, [row])[0]
    )
    return bool(result.rowcount == 1)


def _driver_params(dialect: Dialect, rows: Sequence[dict[str, Any]]) -> list[Any]:
    if dialect.name == "sqlite":
        stamps: dict[datetime, str] = {}  # a batch shares one issued_at: format it once

        def stamp(value: datetime) -> str:
            text = stamps.get(value)
            if text is None:
                text = stamps[value] = value.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S.%f")
            return text

        params: list[Any] = []
        for row in rows:
            values = list(_GET_ROW(row))
            values[_ATTRIBUTES_AT] = _attributes_text(row)
            values[_ISSUED_AT] = stamp(row["issued_at"])
            # SQLAlchemy's Uuid keeps 32 hex digits on SQLite (a native uuid on PostgreSQL).
            values[_RECOMMENDATION_ID] = row["recommendation_id"].replace("-", "")
            params.append(tuple(values))
        return params
    return [{**row, "attributes": _attributes_text(row)} for row in rows]


def _attributes_text(row: dict[str, Any]) -> str:
    text = row.get(ATTRIBUTES_JSON)
    return text if text is not None else _JSON.encode(row["attributes"])
