"""Errors raised by the policy engine.

Each carries a stable ``code`` (the API maps it to a response) and, where there is one,
the ``field`` it is about, so a caller can point at the exact input to fix.
"""

from __future__ import annotations


class PolicyError(ValueError):
    code = "policy_error"

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.field = field


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


class InvalidAttribute(PolicyError):
    """An attribute value that is not text by the one reading (``service.policy.attributes``)."""

    code = "invalid_attribute"
