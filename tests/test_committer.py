"""The SQLite group committer: every job is committed or undone on its own, before it returns."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import pytest
from sqlalchemy import Engine, select, text
from sqlalchemy.orm import Session

from service.errors import Conflict
from service.store import keys
from service.store.committer import CommitterStopped, GroupCommitter
from service.store.models import ApiKey


class Boom(Exception):
    pass


def test_jobs_commit_or_fail_alone(engine: Engine) -> None:
    committer = GroupCommitter(engine)
    committer.start()

    def job(i: int) -> str:
        def write(session: Session) -> str:
            keys.create_key(session, f"key-{i}", "scoring")
            if i % 5 == 0:
                raise Boom(i)  # written, then undone with this job's savepoint only
            return f"key-{i}"

        name = committer.run(write)
        # Returned means committed: another connection sees it.
        with engine.connect() as conn:
            found = conn.execute(text("SELECT name FROM api_keys WHERE name = :n"), {"n": name})
            assert found.scalar_one() == name
        return name

    outcomes: dict[int, str] = {}
    with ThreadPoolExecutor(max_workers=16) as pool:
        futures = {i: pool.submit(job, i) for i in range(60)}
        for i, fut in futures.items():
            try:
                outcomes[i] = fut.result()
            except Boom:
                outcomes[i] = "boom"
    # A duplicate name fails with the service's own error, the others are unaffected.
    with pytest.raises(Conflict):
        committer.run(lambda s: keys.create_key(s, "key-1", "audit"))
    committer.stop()
    with pytest.raises(CommitterStopped):
        committer.run(lambda s: None)

    assert {i for i, o in outcomes.items() if o == "boom"} == set(range(0, 60, 5))
    with Session(engine) as session:
        names = set(session.scalars(select(ApiKey.name)))
    assert names == {f"key-{i}" for i in range(60) if i % 5}
