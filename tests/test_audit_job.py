"""The audit job: both ways of counting agree; empty, future and unknown inputs are refused."""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from service.audit.job import run_audit
from service.audit.month import Month
from service.errors import NotFound, Unprocessable
from service.log.heads import load_signing_key
from service.store.audit_models import AuditSnapshot, TallyBatch
from service.store.log_upkeep import keep_log
from service.store.signing import Signer
from tests.audit_helpers import POLICY, put_live
from tests.helpers import TEST_SIGNING_KEY, bearer
from tests.test_audit_e2e import _replay, _shadow_doc


def _audit_digests(
    factory: sessionmaker[Session], month: Month, now: datetime, time_zone: str = "UTC"
) -> tuple[str, str]:
    with factory() as session:
        run = run_audit(session, POLICY, month, time_zone=time_zone, now=now)
        session.rollback()
    return run.result.published.digest, run.result.internal.digest


def test_tallied_and_untallied_months_count_the_same(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    """A month counted from the records alone, from tally batches plus the untallied tail, and
    from batches of another time zone gives bit-identical reports (exact integer tallies)."""
    put_live(client, make_key, shadow=_shadow_doc())
    scoring = bearer(make_key("scoring"))
    rows = _replay(client, scoring, 300, seed=5)
    month = Month.parse(rows[0]["issued_at"][:7])
    now = datetime.now(UTC)
    signer = Signer.of(load_signing_key(TEST_SIGNING_KEY))
    untallied = _audit_digests(session_factory, month, now)
    keep_log(session_factory, signer, "UTC", tally_now=True)
    assert _audit_digests(session_factory, month, now) == untallied
    # More records after the batch: part tallied, part counted from the records.
    more = _replay(client, scoring, 100, seed=6)
    assert Month.parse(more[0]["issued_at"][:7]) == month
    partial = _audit_digests(session_factory, month, now)
    keep_log(session_factory, signer, "Europe/Berlin", tally_now=True)
    assert _audit_digests(session_factory, month, now) == partial
    with session_factory() as session:
        zones = set(session.scalars(select(TallyBatch.time_zone)))
    assert zones == {"UTC", "Europe/Berlin"}


def test_empty_future_and_unknown_inputs_store_nothing(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    put_live(client, make_key)
    rows = _replay(client, bearer(make_key("scoring")), 40, seed=3)
    month = Month.parse(rows[0]["issued_at"][:7])
    now = datetime.now(UTC)
    with session_factory() as session:
        with pytest.raises(Unprocessable) as exc:
            run_audit(session, POLICY, month.shifted(-2), now=now)
        assert exc.value.code == "empty_month"
        with pytest.raises(Unprocessable) as exc:
            run_audit(session, POLICY, month.shifted(2), now=now)
        assert exc.value.code == "future_month"
        with pytest.raises(Unprocessable) as exc:
            run_audit(session, POLICY, month, reference_group="atlantis", now=now)
        assert (exc.value.code, exc.value.field) == ("unknown_group", "reference_group")
        with pytest.raises(NotFound):
            run_audit(session, "no-such-policy", month, now=now)
        session.rollback()
        assert session.query(AuditSnapshot).count() == 0
        run = run_audit(session, POLICY, month, reference_group="south", now=now)
        assert run.snapshot.versions[0].reference_group == "south"
        session.rollback()
