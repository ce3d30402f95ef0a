"""The bounded value types of the policy document: numbers and text a version may hold, and
the strict base model every part of the document derives from.

Every bound keeps what the service computes from a document finite and storable: scores and
costs stay far from the largest double, counts are exact as doubles, and text holds no control
characters and fits the decision log's columns.
"""

from __future__ import annotations

import math
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, StringConstraints

from service.policy.attributes import MAX_GROUP_KEY_CHARS, TEXT_PATTERN
from service.policy.errors import InvalidTolerance

MAX_SCORE_MAGNITUDE = 1e12
"""Largest |score| a policy may name (range, steps, bin edges): differences stay finite."""
MAX_COST = 1e12
"""Largest error cost: sums of costs over any number of cases stay finite."""
MAX_COUNT = 2**53 - 1
"""Largest count: the largest integer a double holds exactly (counts become rates)."""
MAX_LABEL_CHARS = 256
"""Longest label or group key (the decision log's text columns hold 256 characters)."""
MAX_PROSE_CHARS = 2000
"""Longest description or explanation."""
MAX_TOLERANCE = 0.5
"""Largest tolerance of a promise or an audit check: the largest gap between groups' rates
(or shortfall of a ratio) that still keeps the promise."""


def checked_tolerance(value: float) -> float:
    """``value`` if it is a usable tolerance, in (0, MAX_TOLERANCE]; the one check every
    edge (a derive or audit argument, an audit request, a stored version's targets) uses."""
    if not (math.isfinite(value) and 0.0 < value <= MAX_TOLERANCE):
        raise InvalidTolerance(
            f"must be > 0 and <= {MAX_TOLERANCE} (the largest gap that keeps the promise)",
            field="tolerance",
        )
    return value


Tolerance = Annotated[float, Field(gt=0.0, le=MAX_TOLERANCE, allow_inf_nan=False)]
"""A tolerance in a request body: the bounds of :func:`checked_tolerance`, in the schema."""

Probability = Annotated[float, Field(ge=0.0, le=1.0, allow_inf_nan=False)]
FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]
ScoreValue = Annotated[
    float, Field(ge=-MAX_SCORE_MAGNITUDE, le=MAX_SCORE_MAGNITUDE, allow_inf_nan=False)
]
NonNegative = Annotated[float, Field(ge=0.0, allow_inf_nan=False)]
Cost = Annotated[float, Field(ge=0.0, le=MAX_COST, allow_inf_nan=False)]
Count = Annotated[int, Field(ge=0, le=MAX_COUNT)]
Slug = Annotated[str, Field(pattern=r"^[a-z0-9][a-z0-9._-]{0,63}$")]
Label = Annotated[
    str, StringConstraints(min_length=1, max_length=MAX_LABEL_CHARS, pattern=TEXT_PATTERN)
]
Prose = Annotated[str, StringConstraints(max_length=MAX_PROSE_CHARS, pattern=TEXT_PATTERN)]
GroupKey = Annotated[
    str, StringConstraints(min_length=1, max_length=MAX_GROUP_KEY_CHARS, pattern=TEXT_PATTERN)
]


class StrictModel(BaseModel):
    """The base of every part of the policy document: unknown members refused, frozen."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)
