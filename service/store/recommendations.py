"""Writing and reading decision log records (queries only; no commits).

``insert_records`` is the scoring hot path: one ``executemany`` with the values already in
the database's own form, skipping SQLAlchemy's per-row parameter processing (a batch of
5,000 would otherwise spend most of its time there). The values match what the column types
would bind: SQLite stores UTC datetimes as naive ``YYYY-MM-DD HH:MM:SS.ffffff`` text and JSON
as text; PostgreSQL takes aware datetimes and JSON text. Reading back through the models
gives the same values (a test checks the stored leaf hash against the reread row).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import Dialect, Table
from sqlalchemy.orm import Session

from service.store.models import Recommendation

TABLE: Table = Recommendation.__table__  # type: ignore[assignment]
# Every column the scoring path sets; the id is assigned by the database, seal_id later.
INSERT_COLUMNS: tuple[str, ...] = tuple(
    c.name for c in TABLE.columns if c.name not in ("id", "seal_id")
)
_JSON = json.JSONEncoder(separators=(",", ":"), ensure_ascii=False, allow_nan=False)
_SQL_CACHE: dict[str, str] = {}


def _insert_sql(dialect: Dialect) -> str:
    sql = _SQL_CACHE.get(dialect.name)
    if sql is None:
        quote = dialect.identifier_preparer.quote
        names = ", ".join(quote(c) for c in INSERT_COLUMNS)
        if dialect.name == "sqlite":
            marks = ", ".join("?" for _ in INSERT_COLUMNS)
        else:
            marks = ", ".join(f"%({c})s" for c in INSERT_COLUMNS)
        sql = f"INSERT INTO {quote(TABLE.name)} ({names}) VALUES ({marks})"
        _SQL_CACHE[dialect.name] = sql
    return sql


def insert_records(session: Session, rows: Sequence[dict[str, Any]]) -> None:
    if not rows:
        return
    conn = session.connection()
    dialect = conn.dialect
    sql = _insert_sql(dialect)
    if dialect.name == "sqlite":
        stamps: dict[datetime, str] = {}  # a batch shares one issued_at: format it once

        def stamp(value: datetime) -> str:
            text = stamps.get(value)
            if text is None:
                text = stamps[value] = value.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S.%f")
            return text

        params: list[Any] = [
            tuple(
                row[c]
                if c not in ("attributes", "issued_at")
                else (_JSON.encode(row[c]) if c == "attributes" else stamp(row[c]))
                for c in INSERT_COLUMNS
            )
            for row in rows
        ]
    else:
        params = [{**row, "attributes": _JSON.encode(row["attributes"])} for row in rows]
    conn.exec_driver_sql(sql, params)
