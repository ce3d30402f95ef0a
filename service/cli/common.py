"""What every CLI command shares: the error type that becomes a one-line message."""

from __future__ import annotations


class CliError(Exception):
    """A problem the user can fix: printed as one line, exit code 2."""

    exit_code = 2
