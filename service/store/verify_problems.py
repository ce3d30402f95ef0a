"""What verifying the log reports: the first problem found, and how a check stops on it."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

Progress = Callable[[str], None]


def quiet(_message: str) -> None:
    return None


@dataclass(frozen=True)
class Problem:
    """The first thing that does not match: a record of some kind, a seal, a tree node, a
    tally batch or a mirrored head; ``id`` is its row id (0 when there is none)."""

    kind: str
    id: int
    reason: str


class Found(Exception):
    """Raised by a check with the first problem; :func:`~service.store.log_verify.verify_log`
    catches it and reports the problem."""

    def __init__(self, problem: Problem) -> None:
        self.problem = problem
