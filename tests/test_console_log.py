"""The console's log page (audit role), on SQLite and PostgreSQL: the latest signed head as
the API publishes it, and the log's verification as a background run whose result is kept
(table ``log_verifications``) and reports what the API reports; runs of
``evenhand log verify`` are kept and shown too."""

from __future__ import annotations

import time
from collections.abc import Callable

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, select
from sqlalchemy.orm import Session, sessionmaker

from service.cli.main import main
from service.store import log_verifications
from service.store.log_verifications import LogVerificationRow
from service.store.models import utcnow
from tests.helpers import bearer, make_request
from tests.log_helpers import seal, tamper
from tests.test_console import csrf_of, sign_in


def _decide(client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]) -> None:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    for _ in range(3):
        body = make_request(attributes={"region": "north"})
        r = client.post("/v1/recommendations", json=body, headers=bearer(tokens["scoring"]))
        assert r.status_code == 201, r.text


def _finished(client: TestClient, timeout: float = 60.0) -> str:
    """The log page once no verification is running."""
    deadline = time.monotonic() + timeout
    while True:
        page = client.get("/console/log")
        assert page.status_code == 200
        if "<strong>Running</strong>" not in page.text:
            return page.text
        assert time.monotonic() < deadline, "the verification did not finish"
        time.sleep(0.05)


def test_head_and_background_verification_match_the_api(
    client: TestClient,
    tokens: dict[str, str],
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    engine: Engine,
) -> None:
    _decide(client, tokens, make_key)
    csrf = sign_in(client, tokens["audit"])
    first = client.get("/console/log").text
    assert "Nothing has been sealed yet" in first and "has not been verified yet" in first
    seal(session_factory)
    audit = bearer(tokens["audit"])
    head = client.get("/v1/log/heads", headers=audit).json()[-1]
    page = client.get("/console/log")
    assert page.status_code == 200
    for value in (head["head"]["root"], head["head"]["key_id"], head["signature"]):
        assert value in page.text
    assert f"{head['head']['tree_size']:,}" in page.text
    # Without the form's token: refused, nothing started.
    refused = client.post("/console/log/verify", data={})
    assert refused.status_code == 403
    with session_factory() as session:
        assert session.scalars(select(LogVerificationRow)).all() == []
    api = client.get("/v1/log/verify", headers=audit).json()
    started = client.post("/console/log/verify", data={"csrf": csrf}, follow_redirects=False)
    assert started.status_code == 303 and started.headers["location"] == "/console/log"
    done = _finished(client)
    assert api["ok"] is True and "<strong>Verified</strong>" in done
    assert f'Records checked</th><td class="num">{api["records_checked"]}<' in done
    assert f'Seals checked</th><td class="num">{api["seals_checked"]}<' in done
    assert "by console: auditor" in done
    with session_factory() as session:
        (row,) = session.scalars(select(LogVerificationRow)).all()
        assert row.ok is True and row.records_checked == api["records_checked"]
        assert row.finished_at is not None and row.started_by == "console: auditor"
    # A decision edited behind the service's back: both report the same problem.
    tamper(engine, "UPDATE recommendations SET action_label = 'edited' WHERE id = 1")
    api = client.get("/v1/log/verify", headers=audit).json()
    assert api["ok"] is False
    client.post("/console/log/verify", data={"csrf": csrf_of(done)})
    done = _finished(client)
    assert "Problem found" in done
    assert f"{api['problem']['kind']} {api['problem']['id']}: {api['problem']['reason']}" in done


def test_the_page_shows_a_run_in_progress_and_starts_no_second(
    client: TestClient, tokens: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    csrf = sign_in(client, tokens["audit"])
    with session_factory() as session:  # a run in progress (another worker's, say)
        run_id = log_verifications.start(session, "console: someone", utcnow())
        session.commit()
    page = client.get("/console/log").text
    assert "<strong>Running</strong>" in page and "console: someone" in page
    assert 'action="/console/log/verify"' not in page
    again = client.post("/console/log/verify", data={"csrf": csrf})
    assert "already running" in again.text
    with session_factory() as session:
        assert len(session.scalars(select(LogVerificationRow)).all()) == 1
        log_verifications.fail(session, run_id, "stopped", utcnow())
        session.commit()
    page = client.get("/console/log").text
    assert "Could not finish" in page and "stopped" in page
    assert 'action="/console/log/verify"' in page


def test_a_cli_run_is_kept_and_shown(
    client: TestClient,
    tokens: dict[str, str],
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    database_url: str,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    _decide(client, tokens, make_key)
    seal(session_factory)
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    assert main(["log", "verify", "--json"]) == 0
    capsys.readouterr()
    api = client.get("/v1/log/verify", headers=bearer(tokens["audit"])).json()
    sign_in(client, tokens["audit"])
    page = client.get("/console/log").text
    assert "by evenhand log verify" in page and "<strong>Verified</strong>" in page
    assert f'Records checked</th><td class="num">{api["records_checked"]}<' in page


def test_the_log_page_is_for_the_audit_role(client: TestClient, tokens: dict[str, str]) -> None:
    csrf = sign_in(client, tokens["admin"])
    assert client.get("/console/log").status_code == 403
    assert client.post("/console/log/verify", data={"csrf": csrf}).status_code == 403


def test_concurrent_starts_record_one_run(session_factory: sessionmaker[Session]) -> None:
    """Two auditors pressing the button at the same moment start one run, not two (on
    PostgreSQL an advisory lock orders the starts; on SQLite its write lock does)."""
    from concurrent.futures import ThreadPoolExecutor
    from threading import Barrier

    barrier = Barrier(8)

    def start(i: int) -> int | None:
        barrier.wait()
        return log_verifications.start_run(session_factory, f"console: auditor-{i}")

    with ThreadPoolExecutor(max_workers=8) as pool:
        started = list(pool.map(start, range(8)))
    assert sum(run is not None for run in started) == 1, started
    with session_factory() as session:
        assert len(session.scalars(select(LogVerificationRow)).all()) == 1


def test_a_run_finishing_while_the_page_reads_is_shown_one_way(
    session_factory: sessionmaker[Session],
) -> None:
    """The page reads the newest run, then the newest finished one. A run that finishes in
    between must not come back from the session's identity map as "finished" with no end
    (that page failed to render); it is shown as still running, beside the run before it."""
    from service.store.log_verify import VerifyResult

    with session_factory() as session:
        first = log_verifications.start(session, "console: a", utcnow())
        session.commit()
    with session_factory() as session:
        result = VerifyResult()
        log_verifications.finish(session, first, result, utcnow())
        second = log_verifications.start(session, "console: b", utcnow())
        session.commit()
    with session_factory() as reader:
        seen = log_verifications.latest(reader)  # the newest row, unfinished, held
        assert seen is not None and seen.finished_at is None
        reader.commit()  # SQLite's sessions write-lock; the loaded row stays in the session
        with session_factory() as worker:  # the run ends meanwhile
            log_verifications.finish(worker, second, result, utcnow())
            worker.commit()
        running, done = log_verifications.current_and_last(reader, utcnow())
    assert running is not None and running.id == second
    assert done is not None and done.id == first and done.finished_at is not None
    with session_factory() as session:  # read afresh: the finished run alone
        running, done = log_verifications.current_and_last(session, utcnow())
    assert running is None and done is not None and done.id == second
