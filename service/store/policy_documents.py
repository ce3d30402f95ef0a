"""Policy documents as the store takes them: validated, with one 422 listing every problem,
and auditable (a version with promises says how far realized rates may stray)."""

from __future__ import annotations

import math
from typing import Any

from pydantic import ValidationError

from service.errors import Unprocessable
from service.policy.document import PolicyDocument
from service.policy.errors import InvalidTolerance
from service.policy.values import MAX_TOLERANCE, checked_tolerance


def parse_document(data: Any) -> PolicyDocument:
    """Validate a policy document, turning pydantic errors into one 422 with details."""
    if isinstance(data, PolicyDocument):
        return data
    try:
        return PolicyDocument.model_validate(data)
    except ValidationError as exc:
        details = [
            {
                "code": str(e["type"]),
                "message": str(e["msg"]),
                "field": ".".join(str(p) for p in e["loc"]) or None,
            }
            for e in exc.errors()
        ]
        first = details[0]
        where = f"{first['field']}: " if first["field"] else ""
        raise Unprocessable(
            f"invalid policy document: {where}{first['message']}",
            code="invalid_policy",
            field=first["field"],
            details=details,
        ) from None


def check_auditable(document: PolicyDocument) -> None:
    """A version that makes promises must say how far realized rates may stray: its audit
    tests every gap against that tolerance, so it must be positive (never 0 by omission)."""
    targets = document.targets
    if targets is None:
        return
    tolerance = targets.tolerance
    try:
        checked_tolerance(math.nan if tolerance is None else tolerance)
    except InvalidTolerance:
        raise Unprocessable(
            f"targets.tolerance is {tolerance}: a version with targets needs a tolerance "
            f"greater than 0 and at most {MAX_TOLERANCE} (the largest gap that keeps the "
            "promise; the audit tests every gap against it)",
            code="tolerance_required",
            field="targets.tolerance",
        ) from None
