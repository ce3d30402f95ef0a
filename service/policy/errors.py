"""Errors raised by the policy engine.

Each carries a stable ``code`` and, where there is one, the ``field`` it is about, so a
caller can point at the exact input to fix. ``PolicyError`` is a ``ServiceError`` (the one
root, ``service.errors``, which imports nothing of the service): the API answers it 422 and
the CLI prints it as one line, each in its one place. It is also a ``ValueError``, so pydantic
validators that raise it report a validation error.
"""

from __future__ import annotations

from service.errors import ServiceError


class PolicyError(ServiceError, ValueError):
    status_code = 422
    code = "policy_error"

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message, field=field)


class MissingAttribute(PolicyError):
    code = "missing_attribute"


class UnknownGroup(PolicyError):
    code = "unknown_group"


class ScoreOutOfRange(PolicyError):
    code = "score_out_of_range"


class InternalDeriveError(RuntimeError):
    """The derive engine's own consistency check failed: a defect in Evenhand, not in the
    input. ``detail`` says what failed (naming the rule), ``context`` where (for example a
    cross-fitting fold); ``str()`` joins them into one line."""

    def __init__(self, detail: str, context: str | None = None) -> None:
        self.detail = detail
        self.context = context
        where = "" if context is None else f" in {context}"
        super().__init__(f"internal error{where}: {detail}")

    def within(self, context: str) -> InternalDeriveError:
        """The same error, said to have happened in ``context``."""
        return InternalDeriveError(self.detail, context)


class InvalidTolerance(PolicyError):
    """A tolerance outside (0, MAX_TOLERANCE] (``service.policy.values.checked_tolerance``)."""

    code = "invalid_tolerance"


class InvalidAttribute(PolicyError):
    """An attribute value that is not text by the one reading (``service.policy.attributes``)."""

    code = "invalid_attribute"
