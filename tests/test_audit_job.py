"""The audit job: both ways of counting agree; empty, future and unknown inputs are refused."""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.audit.counting import _grouped_counts, _keyed_counts
from service.audit.job import run_audit
from service.audit.month import Month
from service.errors import NotFound, Unprocessable
from service.store.audit_models import AuditSnapshot
from tests.audit_helpers import POLICY, put_live
from tests.helpers import bearer
from tests.test_audit_e2e import _replay, _shadow_doc


def test_grouped_and_keyed_counting_agree(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    put_live(client, make_key, shadow=_shadow_doc())
    rows = _replay(client, bearer(make_key("scoring")), 300, seed=5)
    start, end = Month.parse(rows[0]["issued_at"][:7]).bounds("UTC")
    with session_factory() as session:
        grouped = _grouped_counts(session, POLICY, start, end, lambda _m: None)
        keyed = _keyed_counts(session, POLICY, start, end, lambda _m: None)
    assert grouped.keys() == keyed.keys()
    for key in grouped:
        assert grouped[key].ints == keyed[key].ints, key
        for name, value in grouped[key].floats.items():
            assert value == pytest.approx(keyed[key].floats[name], abs=1e-9), (key, name)


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
