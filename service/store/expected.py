"""What a caller expects to be current when it asks for a lifecycle change (no imports of the
store itself, so the CLI can name it without loading the database layer)."""

from __future__ import annotations

from enum import Enum
from typing import Final


class Unchecked(Enum):
    """No expected state was given: the request applies to whatever is current."""

    UNCHECKED = "unchecked"


UNCHECKED: Final = Unchecked.UNCHECKED
Expected = int | None | Unchecked
"""The version a caller expects to be current (``None``: none), or ``UNCHECKED``."""
