"""The Month value type: parsing at the edge, bounds in a time zone, arithmetic."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest

from service.audit.month import Month
from service.errors import Unprocessable


def test_bounds_follow_the_time_zone() -> None:
    october = Month.parse("2026-10")
    assert october.bounds("UTC") == (
        datetime(2026, 10, 1, tzinfo=UTC),
        datetime(2026, 11, 1, tzinfo=UTC),
    )
    # Central European Summer Time (UTC+2) until the last Sunday of October, then UTC+1
    # (EU Directive 2000/84/EC; the IANA tz database encodes it).
    assert october.bounds("Europe/Berlin") == (
        datetime(2026, 9, 30, 22, tzinfo=UTC),
        datetime(2026, 10, 31, 23, tzinfo=UTC),
    )
    assert Month.parse("2026-12").bounds("UTC")[1] == datetime(2027, 1, 1, tzinfo=UTC)


def test_arithmetic() -> None:
    m = Month.parse("2026-02")
    assert [str(x) for x in m.previous(3)] == ["2026-01", "2025-12", "2025-11"]
    assert str(m.shifted(11)) == "2027-01"
    assert str(m.shifted(-14)) == "2024-12"
    assert Month.parse("2025-12") < m
    # 23:30 on 31 October in New York is already November in UTC.
    instant = datetime(2026, 11, 1, 3, 30, tzinfo=UTC)
    assert str(Month.containing(instant, "America/New_York")) == "2026-10"
    assert str(Month.containing(instant, "UTC")) == "2026-11"


@pytest.mark.parametrize(
    "text", ["2026-13", "2026-00", "26-10", "2026-1", "0000-01", "9999-12", ""]
)
def test_bad_months_are_a_clear_422(text: str) -> None:
    with pytest.raises(Unprocessable) as exc:
        Month.parse(text)
    assert exc.value.field == "month"


def test_the_extreme_months_have_bounds() -> None:
    # 9998-12 ends at the start of 9999-01: still a datetime; 9999-12 would not be.
    assert Month.parse("9998-12").bounds("UTC")[1] == datetime(9999, 1, 1, tzinfo=UTC)
    assert Month.parse("1900-01").bounds("UTC")[0] == datetime(1900, 1, 1, tzinfo=UTC)


def test_unknown_time_zone() -> None:
    with pytest.raises(Unprocessable) as exc:
        Month.parse("2026-10").bounds("Mars/Olympus")
    assert exc.value.field == "timezone"
