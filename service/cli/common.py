"""What every CLI command shares: ``CliError`` and the one mapping of a refusal to a line and
an exit code."""

from __future__ import annotations

from service.errors import ServiceError

USER_ERROR_EXIT = 2
"""The exit code of every refusal: something the user can fix (argparse uses 2 as well)."""


class CliError(ServiceError):
    """A problem with the command's own input (an argument, a file): printed as one line,
    exit code 2, like every other :class:`ServiceError`."""

    code = "invalid_argument"
    exit_code = USER_ERROR_EXIT


def refusal_line(exc: ServiceError) -> str:
    """The one line the CLI prints for a refusal: its message and, when it is not the CLI's
    own, the stable code the API would answer with (``... (unknown_policy)``)."""
    if isinstance(exc, CliError):
        return f"evenhand: error: {exc.message}"
    return f"evenhand: error: {exc.message} ({exc.code})"


def tolerance_arg(text: str) -> float:
    """``--tolerance``, checked once at the edge (``service.policy.values.checked_tolerance``):
    an argparse ``type``, so commands receive a tolerance that is already valid."""
    from service.policy.errors import InvalidTolerance
    from service.policy.values import checked_tolerance

    try:
        value = float(text)
    except ValueError:
        raise CliError(f"--tolerance {text!r}: not a number") from None
    try:
        return checked_tolerance(value)
    except InvalidTolerance as exc:
        raise CliError(f"--tolerance {value}: {exc.message}") from None
