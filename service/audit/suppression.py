"""Small-cell suppression of published counts.

Rule (after the CMS Cell Size Suppression Policy): no count from 1 to 10 is published (zero
may be); it is shown as ``"<11"``. Nor may any figure be published from which such a count
could be worked out. Counts are tied by additive relations (``n = actions + no_actions``,
``positives = tp + fn``, a version's total = the sum over its groups, ...): if exactly one
member of a relation were hidden, it would follow from the others. So, until nothing changes,
every relation with exactly one hidden member gets a second one hidden (complementary
suppression: the smallest published member, preferring non-zero ones, which hide more). A rate
is withheld when its numerator or denominator is hidden (a rate times its denominator gives
the numerator back).
"""

from __future__ import annotations

from collections.abc import Hashable, Iterable, Mapping, Sequence
from enum import StrEnum
from typing import TypeVar

SMALL_CELL_LIMIT = 11
"""Counts from 1 to ``SMALL_CELL_LIMIT - 1`` are never published."""

SMALL_CELL_LABEL = "<11"

K = TypeVar("K", bound=Hashable)


class Visibility(StrEnum):
    SHOWN = "shown"
    SMALL = "small"  # 1..10: published as "<11"
    COMPLEMENTARY = "complementary"  # hidden so that a small count cannot be derived


def is_small(value: int) -> bool:
    return 0 < value < SMALL_CELL_LIMIT


def suppress(
    values: Mapping[K, int], relations: Iterable[tuple[K, Sequence[K]]]
) -> dict[K, Visibility]:
    """Visibility of every cell, given the relations ``parent = sum(children)``.

    Every cell a relation names must be in ``values``.
    """
    relations = [(parent, list(children)) for parent, children in relations]
    for parent, children in relations:
        for key in (parent, *children):
            if key not in values:
                raise KeyError(f"relation names {key!r}, which has no value")
    visibility: dict[K, Visibility] = {
        key: Visibility.SMALL if is_small(v) else Visibility.SHOWN for key, v in values.items()
    }

    def hidden(key: K) -> bool:
        return visibility[key] is not Visibility.SHOWN

    changed = True
    while changed:
        changed = False
        for parent, children in relations:
            members = [*children, parent]
            if sum(1 for m in members if hidden(m)) != 1:
                continue
            shown = [m for m in members if not hidden(m)]
            nonzero = [m for m in shown if values[m] != 0]
            pool = nonzero or shown
            # Children before the parent on ties: the parent is usually the more useful figure.
            victim = min(pool, key=lambda m: (values[m], m == parent))
            visibility[victim] = Visibility.COMPLEMENTARY
            changed = True
    return visibility


def published(value: int, visibility: Visibility) -> int | str | None:
    """How a count appears in a report: the number, ``"<11"`` or ``None`` (withheld)."""
    if visibility is Visibility.SHOWN:
        return value
    if visibility is Visibility.SMALL:
        return SMALL_CELL_LABEL
    return None
