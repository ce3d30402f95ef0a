"""A calendar month as a value: parsed once at the edge, then passed around as a ``Month``.

The audit's cohort is the decisions *issued* in one calendar month, cut in the deployment's time
zone. ``Month.parse`` accepts ``YYYY-MM`` for years 1900 to 9998 (a month must have a next month
that ``datetime`` can represent); everything else is a clear 422.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Self
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from service.errors import Unprocessable

_PATTERN = re.compile(r"^(\d{4})-(0[1-9]|1[0-2])$")
FIRST_YEAR = 1900
LAST_YEAR = 9998


def zone_of(time_zone: str) -> ZoneInfo:
    """The IANA time zone ``time_zone``, or a 422 naming the bad value."""
    try:
        return ZoneInfo(time_zone)
    except (ZoneInfoNotFoundError, ValueError):
        raise Unprocessable(f"unknown time zone {time_zone!r}", field="timezone") from None


@dataclass(frozen=True, order=True, slots=True)
class Month:
    year: int
    month: int

    def __post_init__(self) -> None:
        if not (FIRST_YEAR <= self.year <= LAST_YEAR and 1 <= self.month <= 12):
            raise ValueError(f"month {self.year:04d}-{self.month:02d} is out of range")

    @classmethod
    def parse(cls, text: str, field: str = "month") -> Self:
        m = _PATTERN.match(text)
        if m is None:
            raise Unprocessable(f"month {text!r} is not of the form YYYY-MM", field=field)
        year = int(m.group(1))
        if not FIRST_YEAR <= year <= LAST_YEAR:
            raise Unprocessable(
                f"month {text!r}: the year must be between {FIRST_YEAR} and {LAST_YEAR}",
                field=field,
            )
        return cls(year, int(m.group(2)))

    @classmethod
    def containing(cls, instant: datetime, time_zone: str) -> Self:
        local = instant.astimezone(zone_of(time_zone))
        return cls(local.year, local.month)

    def __str__(self) -> str:
        return f"{self.year:04d}-{self.month:02d}"

    def shifted(self, months: int) -> Month:
        index = self.year * 12 + (self.month - 1) + months
        return Month(index // 12, index % 12 + 1)

    def previous(self, count: int) -> list[Month]:
        """The ``count`` months before this one, latest first."""
        return [self.shifted(-i) for i in range(1, count + 1)]

    def bounds(self, time_zone: str) -> tuple[datetime, datetime]:
        """[start, end) of the month in ``time_zone``, as UTC instants."""
        zone = zone_of(time_zone)
        start = datetime(self.year, self.month, 1, tzinfo=zone)
        end = datetime(self.year + self.month // 12, self.month % 12 + 1, 1, tzinfo=zone)
        return start.astimezone(UTC), end.astimezone(UTC)

    def days_after_end(self, time_zone: str, days: int) -> datetime:
        """The instant ``days`` days after the month's end (a maturity deadline)."""
        return self.bounds(time_zone)[1] + timedelta(days=days)
