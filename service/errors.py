"""The one root of every refusal, :class:`ServiceError`, and its HTTP kinds.

Everything Evenhand refuses (a request, a policy document, a derive input, a CLI argument)
is a ``ServiceError``: the policy engine's ``PolicyError`` (``service.policy.errors``) and
the CLI's ``CliError`` derive from it. It is mapped once to HTTP (``service.api.errors``:
``{"error": {"code", "message", "field", "details"}}`` with the status code of its class)
and once to the CLI (``service.cli.common.exit_status``: one line, exit code 2). Codes are
stable; messages say what to fix.

This module imports nothing of the service (nor any third-party package), so the pure
layers (``service.policy``, ``service.stats``) can derive from it.
"""

from __future__ import annotations

from typing import Any


class ServiceError(Exception):
    """A refusal: something the caller can fix (or, for 503, retry)."""

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


class LogInconsistent(Conflict):
    """The log's own records contradict each other: it was damaged or edited. Nothing is
    computed from it until ``evenhand log verify`` has found the record."""

    code = "log_inconsistent"


class PayloadTooLarge(ServiceError):
    status_code = 413
    code = "payload_too_large"


class Unprocessable(ServiceError):
    status_code = 422
    code = "invalid_input"


class TooManyRequests(ServiceError):
    """429: too many attempts; answered with ``Retry-After: retry_after`` seconds."""

    status_code = 429
    code = "too_many_attempts"

    def __init__(self, message: str, retry_after: int) -> None:
        super().__init__(message)
        self.retry_after = retry_after


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


def item_problem(index: int, error: ServiceError) -> dict[str, Any]:
    """One refused item of a batch as an error detail: its own code and message, the field
    prefixed with ``items.<index>`` (``items.3.score``)."""
    field = error.field
    return {
        "code": error.code,
        "message": error.message,
        "field": f"items.{index}" + (f".{field}" if field else ""),
    }


def item_index(field: str | None) -> int:
    """The item index of a detail's field (``items.3.score`` -> 3); 0 when there is none."""
    parts = (field or "").split(".")
    return int(parts[1]) if len(parts) > 1 and parts[1].isdigit() else 0


class BatchRefused(Unprocessable):
    """A batch with refused items: none of it is written, and every problem is listed (sorted by
    item; an item may have several) in ``details``. One rule for every batch endpoint."""

    code = "invalid_batch"

    def __init__(self, problems: list[dict[str, Any]], total: int) -> None:
        ordered = sorted(problems, key=lambda p: item_index(p["field"]))
        refused = len({item_index(p["field"]) for p in ordered})
        first = ordered[0]
        super().__init__(
            f"{refused} of {total} item(s) refused, nothing was written; first: "
            f"{first['field']}: {first['message']} (every problem is listed in details)",
            field=first["field"],
            details=ordered,
        )
