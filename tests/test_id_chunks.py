"""Look-ups by a non-unique integer key (``service/store/id_chunks.py``): the same rows as a
plain ``IN`` list, and on PostgreSQL without statistics a read of the index's few pages
instead of the whole index or table for every chunk."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import (
    BigInteger,
    Column,
    ColumnElement,
    Engine,
    Index,
    Integer,
    MetaData,
    Table,
    select,
)

from service.store.id_chunks import CHUNK, key_in, sorted_chunks

ROWS = 200_000


def _table() -> Table:
    table = Table(
        "id_chunks_probe",
        MetaData(),
        Column("id", BigInteger, primary_key=True),
        Column("k", BigInteger, nullable=False),
        Column("outcome", Integer, nullable=False),
        prefixes=["TEMPORARY"],
    )
    Index("ix_id_chunks_probe_k", table.c.k, table.c.id)
    return table


def test_sorted_chunks_are_distinct_ascending_and_bounded() -> None:
    ids = [9, 3, 3, 7, 1, *range(100, 100 + 2 * CHUNK)]
    chunks = list(sorted_chunks(ids))
    assert [len(c) for c in chunks] == [CHUNK, CHUNK, 4]
    flat = [i for c in chunks for i in c]
    assert flat == sorted(set(ids))
    assert list(sorted_chunks([])) == []


def test_key_in_finds_what_in_finds(engine: Engine) -> None:
    table = _table()
    with engine.connect() as conn:
        table.create(conn)
        # Keys 0..999, each with k % 4 rows.
        keys = [k for k in range(1_000) for _ in range(k % 4)]
        rows = [{"id": i, "k": k, "outcome": k % 2} for i, k in enumerate(keys)]
        conn.execute(table.insert(), rows)
        wanted = [999, 3, 4, 5, 6, 7, 500, 998, 0, 1, 2, *range(259, 200, -7)]  # any order
        plain = conn.execute(
            select(table.c.k, table.c.id).where(table.c.k.in_(wanted)).order_by(table.c.id)
        ).all()
        ours = conn.execute(
            select(table.c.k, table.c.id).where(key_in(table.c.k, wanted)).order_by(table.c.id)
        ).all()
        assert ours == plain and len(plain) == sum(k % 4 for k in wanted)
        conn.rollback()


def test_without_statistics_postgresql_reads_the_index_not_everything(engine: Engine) -> None:
    if engine.dialect.name != "postgresql":
        pytest.skip("the planner in question is PostgreSQL's")
    table = _table()
    with engine.connect() as conn:
        table.create(conn)
        conn.exec_driver_sql(
            f"INSERT INTO id_chunks_probe SELECT g, g, 0 FROM generate_series(1, {ROWS}) g"
        )
        chunk = list(range(50_000, 50_000 + 3 * CHUNK, 3))

        def scans(condition: ColumnElement[bool]) -> list[tuple[str, int]]:
            """The scan nodes of the executed plan, with the rows each one looked at."""
            query = select(table.c.k, table.c.id, table.c.outcome).where(condition)
            compiled = query.compile(conn, compile_kwargs={"literal_binds": True})
            plan = conn.exec_driver_sql(f"EXPLAIN (ANALYZE, FORMAT JSON) {compiled}").scalar_one()
            out: list[tuple[str, int]] = []
            nodes = [(plan if isinstance(plan, list) else json.loads(plan))[0]["Plan"]]
            while nodes:
                node = nodes.pop()
                nodes += node.get("Plans", [])
                if "Scan" in node["Node Type"]:
                    looked = node["Actual Rows"] + node.get("Rows Removed by Filter", 0)
                    out.append((node["Node Type"], looked))
            return out

        plain = scans(table.c.k.in_(chunk))
        ours = scans(key_in(table.c.k, chunk))
        assert plain == [("Seq Scan", ROWS)]  # the premise: a plain IN list reads it all
        assert ours, ours
        for kind, looked in ours:  # the index, and no more rows than the chunk asks for
            assert "Seq" not in kind and looked <= len(chunk), ours
        conn.rollback()
