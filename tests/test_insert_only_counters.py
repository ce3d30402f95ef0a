"""PostgreSQL's own counters after a working day: not one row of the log updated or deleted.

A database of its own, so no other test's tampering counts: policies submitted, approved,
activated and shadowed, keys made and revoked, single and batch scoring, outcomes and a
correction, a final decision, an audit, and the log sealed and tallied. Then every
connection is closed (a backend reports its counts when it ends) and
``pg_stat_user_tables`` is read (PostgreSQL documentation, "The Cumulative Statistics
System", section 28.2: ``n_tup_upd``, ``n_tup_del``).
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import text

from service.app import create_app
from service.settings import Settings
from service.store.db import create_db_engine, create_session_factory
from service.store.migrate import upgrade
from tests.conftest import _create_postgres_database
from tests.helpers import TEST_SECRET, bearer, create_key, make_request
from tests.insert_only import LOG_TABLES, changes_allowed
from tests.log_helpers import seal, write_every_kind

pytestmark = pytest.mark.slow


@pytest.fixture
def own_database() -> Iterator[str]:
    url, drop = _create_postgres_database()
    try:
        with changes_allowed():
            upgrade(url)
        yield url
    finally:
        drop()


def test_a_working_day_updates_and_deletes_no_row_of_the_log(own_database: str) -> None:
    settings = Settings(database_url=own_database, draw_secret=TEST_SECRET)  # type: ignore[arg-type]
    engine = create_db_engine(settings)
    factory = create_session_factory(engine)

    def make_key(role: str, name: str | None = None) -> str:
        return create_key(factory, role, name)

    with TestClient(create_app(settings)) as client:
        write_every_kind(client, make_key)
        scoring = bearer(make_key("scoring"))
        for i in range(5):
            r = client.post(
                "/v1/recommendations", json=make_request(case_id=f"s-{i}"), headers=scoring
            )
            assert r.status_code == 201, r.text
        seal(factory)
    engine.dispose()  # every backend ends and reports its counts

    counter = create_db_engine(settings)
    with counter.connect() as conn:
        conn.execute(text("SELECT pg_stat_clear_snapshot()"))
        rows = conn.execute(
            text("SELECT relname, n_tup_ins, n_tup_upd, n_tup_del FROM pg_stat_user_tables")
        ).all()
    counter.dispose()
    counts = {name: (ins, upd, dele) for name, ins, upd, dele in rows}
    assert set(counts) >= LOG_TABLES
    assert counts["recommendations"][0] >= 17  # the day was counted at all
    changed = {t: counts[t][1:] for t in LOG_TABLES if counts[t][1:] != (0, 0)}
    assert changed == {}, f"log tables with updated or deleted rows: {changed}"
