"""One base error for everything the service refuses, rendered in one JSON shape.

Every refusal becomes ``{"error": {"code", "message", "field", "details"}}`` with the status
code of its class (see ``service.api.errors``). Codes are stable; messages say what to fix.
"""

from __future__ import annotations

from typing import Any


class ServiceError(Exception):
    status_code = 400
    code = "bad_request"

    def __init__(
        self,
        message: str,
        *,
        field: str | None = None,
        code: str | None = None,
        details: list[dict[str, Any]] | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.field = field
        if code is not None:
            self.code = code
        self.details = details or []


class Unauthorized(ServiceError):
    status_code = 401
    code = "unauthorized"


class Forbidden(ServiceError):
    status_code = 403
    code = "forbidden"


class NotFound(ServiceError):
    status_code = 404
    code = "not_found"


class Conflict(ServiceError):
    status_code = 409
    code = "conflict"


class PayloadTooLarge(ServiceError):
    status_code = 413
    code = "payload_too_large"


class Unprocessable(ServiceError):
    status_code = 422
    code = "invalid_input"


class ServiceUnavailable(ServiceError):
    """503: try again later; answered with ``Retry-After: retry_after`` seconds."""

    status_code = 503
    code = "unavailable"
    retry_after = 2


def check_batch_size(count: int, limit: int) -> None:
    """Refuse a batch of more than ``limit`` items: one rule for every batch endpoint."""
    if count > limit:
        raise PayloadTooLarge(
            f"a batch holds at most {limit} items (got {count}); split it",
            code="batch_too_large",
            field="items",
        )
