"""What verifying a month bundle finds (standard library only): the result, and the problems
that stop the check (see :mod:`service.log.bundle_verify`)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


class Problem(Exception):
    """The bundle does not verify; ``line`` is where (1-based), 0 for the file as a whole."""

    def __init__(self, line: int, message: str) -> None:
        super().__init__(message)
        self.line = line
        self.message = message


class Unreadable(Problem):
    """Not a bundle at all (exit 2)."""


@dataclass
class Result:
    """What a verification found."""

    ok: bool = False
    problem: str | None = None
    line: int = 0
    policy: str | None = None
    month: str | None = None
    records: dict[str, int] = field(default_factory=dict)
    decisions: int = 0
    heads_checked: int = 0
    tree_size: int = 0
    key_ids: list[str] = field(default_factory=list)
    snapshot_digest: str | None = None
    untrusted_keys: bool = False

    def as_json(self) -> dict[str, Any]:
        return dict(self.__dict__)
