"""The two ways decision records reach the table write the same rows.

On PostgreSQL a group of ``POSTGRES_COPY_FROM`` records or more goes by ``COPY ... FROM
STDIN``, fewer by ``executemany``; on SQLite by multi-row INSERTs. Whichever way, reading the
records back gives exactly the records written; a request_id stored already fails the whole
insert with SQLAlchemy's ``IntegrityError`` (the callers' retry depends on it) and leaves the
connection usable; a connection cut during ``COPY`` is reported as unavailable (503).
"""

from __future__ import annotations

import pytest
from sqlalchemy import Engine, text
from sqlalchemy.exc import DBAPIError, IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from service.api.recommendation_schemas import RecommendationRequest
from service.log.records import DecisionRecord
from service.store.db import is_unavailable
from service.store.decision_pipeline import DecisionPipeline, fingerprint
from service.store.recommendations import POSTGRES_COPY_FROM, insert_records, stored_records
from service.store.scoring import ScoringContext
from tests.helpers import count_rows, live_scoring_context, make_request


@pytest.fixture
def ctx(session_factory: sessionmaker[Session]) -> ScoringContext:
    return live_scoring_context(session_factory)


def _decided(engine: Engine, ctx: ScoringContext, n: int) -> list[DecisionRecord]:
    regions = ["north", "south"]
    reqs = [
        RecommendationRequest.model_validate(
            make_request(score=(i % 97) / 97, attributes={"region": regions[i % 2]})
        )
        for i in range(n)
    ]
    with engine.connect() as conn, conn.begin():
        outcomes = DecisionPipeline(conn, ctx).decide(reqs, [fingerprint(r) for r in reqs])
    records = [o for o in outcomes if isinstance(o, DecisionRecord)]
    assert len(records) == n
    return records


@pytest.mark.parametrize("n", [POSTGRES_COPY_FROM - 1, POSTGRES_COPY_FROM, 700])
def test_records_read_back_as_written(
    engine: Engine, ctx: ScoringContext, session_factory: sessionmaker[Session], n: int
) -> None:
    records = _decided(engine, ctx, n)
    with engine.connect() as conn, conn.begin():
        insert_records(conn, records)
    with engine.connect() as conn:
        stored = stored_records(conn, [r.request_id for r in records])
    assert [stored[r.request_id] for r in records] == records
    assert count_rows(session_factory, "recommendations") == n


@pytest.mark.parametrize("n", [POSTGRES_COPY_FROM - 1, 200])
def test_a_stored_request_id_fails_the_insert_and_the_connection_goes_on(
    engine: Engine, ctx: ScoringContext, session_factory: sessionmaker[Session], n: int
) -> None:
    records = _decided(engine, ctx, n)
    fresh = _decided(engine, ctx, n)
    with engine.connect() as conn:
        with conn.begin():
            insert_records(conn, records[:1])
        with pytest.raises(IntegrityError), conn.begin():
            insert_records(conn, fresh[: n // 2] + records[:1] + fresh[n // 2 :])
        with conn.begin():  # rolled back, then usable again
            insert_records(conn, fresh)
    assert count_rows(session_factory, "recommendations") == 1 + n


def test_a_connection_cut_during_copy_is_unavailable(
    engine: Engine, ctx: ScoringContext, session_factory: sessionmaker[Session]
) -> None:
    if engine.dialect.name != "postgresql":
        pytest.skip("COPY is PostgreSQL's")
    records = _decided(engine, ctx, 300)
    with engine.connect() as conn:
        pid = conn.exec_driver_sql("SELECT pg_backend_pid()").scalar_one()
        conn.commit()
        with engine.connect() as other, other.begin():
            other.execute(text("SELECT pg_terminate_backend(:pid)"), {"pid": pid})
        with pytest.raises(DBAPIError) as raised, conn.begin():
            insert_records(conn, records)
    assert is_unavailable(raised.value) and raised.value.connection_invalidated, raised.value
    with engine.connect() as conn, conn.begin():  # the pool hands out a working connection
        insert_records(conn, records)
    assert count_rows(session_factory, "recommendations") == 300
