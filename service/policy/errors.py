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


class InvalidAttribute(PolicyError):
    """An attribute value that is not text by the one reading (``service.policy.attributes``)."""

    code = "invalid_attribute"
