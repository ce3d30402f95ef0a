"""``evenhand jobs audit-due`` and the job runner: every ended, mature month without a mature
snapshot is audited once, with the same function as ``evenhand audit run``; a month that is
not mature yet is not stored; the runner seals the log."""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime, timedelta

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.audit.month import Month
from service.cli.main import main
from service.jobs.due_audits import audit_due, candidate_months
from service.jobs.runner import JobRunner
from service.settings import Settings
from service.store.audit_models import AuditSnapshot, Seal
from service.store.signing import signer_from_settings
from tests.helpers import TEST_SIGNING_KEY, bearer, make_request
from tests.test_operations import scrape, value


def _snapshots(factory: sessionmaker[Session]) -> list[tuple[str, str, str]]:
    with factory() as session:
        return [
            (p, m, c["maturity"]["state"])
            for p, m, c in session.execute(
                select(AuditSnapshot.policy, AuditSnapshot.month, AuditSnapshot.content)
            )
        ]


def test_due_months_are_audited_once_when_mature(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
    database_url: str,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    publish()
    for score in (0.2, 0.5, 0.8):
        r = client.post(R, json=make_request(score=score), headers=bearer(tokens["scoring"]))
        assert r.status_code == 201, r.text
    now = datetime.now(UTC)
    month = Month.containing(now, "UTC")
    end = month.bounds("UTC")[1]

    # While the month runs, nothing is due (the CLI says so).
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    assert main(["jobs", "audit-due"]) == 0
    assert "no month is due" in capsys.readouterr().out
    with session_factory() as session:
        assert candidate_months(session, "UTC", now) == []

    # An hour after the month's end, no outcome has arrived: audited but not stored.
    results = audit_due(session_factory, "UTC", now=end + timedelta(hours=1))
    assert [(r.policy, r.month, r.outcome) for r in results] == [
        ("readmission", month, "not-mature")
    ]
    assert _snapshots(session_factory) == []

    # Long after, the waiting period is over: one mature snapshot, then nothing is due.
    later = end + timedelta(days=400)
    results = audit_due(session_factory, "UTC", now=later)
    assert [(r.policy, r.month, r.outcome) for r in results] == [("readmission", month, "stored")]
    assert _snapshots(session_factory) == [("readmission", str(month), "mature")]
    with session_factory() as session:
        assert candidate_months(session, "UTC", later) == []
    assert audit_due(session_factory, "UTC", now=later) == []

    # The metrics show the policy's last audit.
    samples = scrape(client, tokens["audit"])
    assert value(samples, "evenhand_audit_last_age_seconds", policy="readmission") >= 0
    assert ("evenhand_audit_last_age_seconds", frozenset({("policy", "readmission")})) in samples


def test_a_provisional_snapshot_does_not_count_as_done(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
    database_url: str,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    publish()
    r = client.post(R, json=make_request(), headers=bearer(tokens["scoring"]))
    assert r.status_code == 201
    month = Month.containing(datetime.now(UTC), "UTC")
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    assert main(["audit", "run", "--policy", "readmission", "--month", str(month)]) == 0
    assert _snapshots(session_factory) == [("readmission", str(month), "provisional")]
    later = month.bounds("UTC")[1] + timedelta(days=400)
    with session_factory() as session:
        assert candidate_months(session, "UTC", later) == [("readmission", month)]


def test_runner_seals_and_audits(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
    database_url: str,
) -> None:
    publish()
    r = client.post(R, json=make_request(), headers=bearer(tokens["scoring"]))
    assert r.status_code == 201
    settings = Settings(database_url=database_url, signing_key=TEST_SIGNING_KEY)  # type: ignore[arg-type]
    runner = JobRunner(
        session_factory,
        signer_from_settings(settings),
        settings,
        seal_every=60,
        audit_every=3600,
    )
    assert runner.round(0.0)
    with session_factory() as session:
        assert session.scalar(select(func.count()).select_from(Seal)) >= 1
    # Not due again before its interval.
    with session_factory() as session:
        seals = session.scalar(select(func.count()).select_from(Seal))
    client.post(R, json=make_request(), headers=bearer(tokens["scoring"]))
    assert runner.round(30.0)
    with session_factory() as session:
        assert session.scalar(select(func.count()).select_from(Seal)) == seals
    assert runner.round(61.0)
    with session_factory() as session:
        assert session.scalar(select(func.count()).select_from(Seal)) > seals


R = "/v1/recommendations"
