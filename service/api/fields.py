"""Bounded field types shared by the request bodies, path and query parameters.

Nothing reaches the database that it cannot store: integers fit the columns they are compared
with (``INT32_MAX``: the ``integer`` columns of versions and snapshot ids on PostgreSQL, whose
32-bit range SQLite's 64-bit integers contain), text has no control characters (PostgreSQL
refuses U+0000; U+0001 to U+001F are refused with it) and fits its column, instants can be
written in UTC. Every bound appears in the OpenAPI schema and in docs/api.md.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated, Any

from fastapi import Path
from pydantic import (
    AfterValidator,
    AwareDatetime,
    BeforeValidator,
    Field,
    PlainSerializer,
    PlainValidator,
    StringConstraints,
    WithJsonSchema,
)
from pydantic_core import PydanticCustomError

from service.audit.month import Month
from service.errors import ServiceError
from service.policy.attributes import (
    MAX_NAME_CHARS,
    MAX_VALUE_CHARS,
    NAME_PATTERN,
    TEXT_PATTERN,
    VALUE_PATTERN,
    AttributeProblem,
    read_attribute,
)

INT32_MAX = 2**31 - 1
"""Largest version number or snapshot id: PostgreSQL's ``integer`` (SQLite's is 64-bit)."""
MAX_TEXT_CHARS = 128
"""Longest identifier: request_id, case_id, recommendation_id, source, decided_by."""
MAX_REASON_CHARS = 2000
"""Longest reason (lifecycle steps, outcome corrections)."""
SLUG_PATTERN = r"^[a-z0-9][a-z0-9._-]{0,63}$"

Text = Annotated[
    str,
    StringConstraints(min_length=1, max_length=MAX_TEXT_CHARS, pattern=TEXT_PATTERN),
]
Reason = Annotated[
    str,
    StringConstraints(min_length=1, max_length=MAX_REASON_CHARS, pattern=TEXT_PATTERN),
]
OptionalReason = Annotated[
    str, StringConstraints(max_length=MAX_REASON_CHARS, pattern=TEXT_PATTERN)
]
PolicyName = Annotated[str, StringConstraints(pattern=SLUG_PATTERN)]
VersionNumber = Annotated[int, Field(ge=1, le=INT32_MAX)]

# Path parameters (FastAPI's Path carries the same constraints into the OpenAPI document).
PolicyPath = Annotated[str, Path(pattern=SLUG_PATTERN, description="policy name")]
VersionPath = Annotated[int, Path(ge=1, le=INT32_MAX, description="version number")]
RecommendationIdPath = Annotated[
    str,
    Path(
        min_length=1,
        max_length=MAX_TEXT_CHARS,
        pattern=TEXT_PATTERN,
        description="the recommendation_id of a recommendation",
    ),
]


def _attribute_value(value: Any) -> str:
    try:
        return read_attribute(value)
    except AttributeProblem as exc:
        raise PydanticCustomError("invalid_attribute", "{reason}", {"reason": str(exc)}) from None


AttributeName = Annotated[
    str, StringConstraints(min_length=1, max_length=MAX_NAME_CHARS, pattern=NAME_PATTERN)
]
AttributeValue = Annotated[
    str,
    StringConstraints(min_length=1, max_length=MAX_VALUE_CHARS, pattern=VALUE_PATTERN),
    # Runs first: the one reading of service.policy.attributes (strings only, NFC, trimmed).
    BeforeValidator(_attribute_value),
]


def _in_utc(value: datetime) -> datetime:
    try:
        return value.astimezone(UTC)
    except OverflowError:
        raise PydanticCustomError(
            "datetime_out_of_range", "cannot be expressed in UTC (the year leaves 1 to 9999)"
        ) from None


Instant = Annotated[AwareDatetime, AfterValidator(_in_utc)]
"""A moment with its UTC offset, kept in UTC."""


MONTH_PATTERN = r"^\d{4}-(0[1-9]|1[0-2])$"


def _month(value: Any) -> Month:
    if isinstance(value, Month):
        return value
    if not isinstance(value, str):
        raise PydanticCustomError("month_type", "a month is text of the form YYYY-MM")
    try:
        return Month.parse(value)
    except ServiceError as exc:
        raise PydanticCustomError("month", "{reason}", {"reason": exc.message}) from None


MonthField = Annotated[
    Month,
    PlainValidator(_month),
    PlainSerializer(str, return_type=str),
    WithJsonSchema({"type": "string", "pattern": MONTH_PATTERN, "examples": ["2026-10"]}),
]
"""A calendar month in a body, ``YYYY-MM``: parsed into a :class:`Month` at the edge."""
