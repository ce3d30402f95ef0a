"""The audit job: month boundaries in a time zone, and both ways of counting agree."""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.audit.job import _grouped_counts, _keyed_counts, month_bounds, previous_months
from service.errors import Unprocessable
from tests.audit_helpers import POLICY, put_live
from tests.helpers import bearer
from tests.test_audit_e2e import _replay, _shadow_doc


def test_month_bounds_follow_the_time_zone() -> None:
    assert month_bounds("2026-10", "UTC") == (
        datetime(2026, 10, 1, tzinfo=UTC),
        datetime(2026, 11, 1, tzinfo=UTC),
    )
    # Central European Summer Time (UTC+2) until the last Sunday of October, then UTC+1
    # (EU Directive 2000/84/EC; the IANA tz database encodes it).
    assert month_bounds("2026-10", "Europe/Berlin") == (
        datetime(2026, 9, 30, 22, tzinfo=UTC),
        datetime(2026, 10, 31, 23, tzinfo=UTC),
    )
    assert month_bounds("2026-12", "UTC")[1] == datetime(2027, 1, 1, tzinfo=UTC)
    assert previous_months("2026-02", 3) == ["2026-01", "2025-12", "2025-11"]
    with pytest.raises(Unprocessable):
        month_bounds("2026-13", "UTC")
    with pytest.raises(Unprocessable):
        month_bounds("2026-10", "Mars/Olympus")


def test_grouped_and_keyed_counting_agree(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    put_live(client, make_key, shadow=_shadow_doc())
    rows = _replay(client, bearer(make_key("scoring")), 300, seed=5)
    start, end = month_bounds(rows[0]["issued_at"][:7], "UTC")
    with session_factory() as session:
        grouped = _grouped_counts(session, POLICY, start, end, lambda _m: None)
        keyed = _keyed_counts(session, POLICY, start, end, lambda _m: None)
    assert grouped.keys() == keyed.keys()
    for key in grouped:
        assert grouped[key].ints == keyed[key].ints, key
        for name, value in grouped[key].floats.items():
            assert value == pytest.approx(keyed[key].floats[name], abs=1e-9), (key, name)
