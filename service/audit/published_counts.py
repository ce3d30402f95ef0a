"""Which counts of a version's month may be published, after small-cell suppression.

The published view shows no count from 1 to 10 and no figure from which one could be worked
out (:mod:`service.audit.suppression`); the internal view shows everything.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from service.audit.realized import CellCounts, Rate, ShadowCounts
from service.audit.snapshot_model import Estimate, PublishedCount
from service.audit.suppression import Visibility, published, suppress

_CELL_RELATIONS: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("n", ("actions", "no_actions")),
    ("n", ("observed", "unobserved")),
    ("observed", ("positives", "negatives")),
    ("positives", ("tp", "fn")),
    ("negatives", ("fp", "tn")),
    ("observed_actions", ("tp", "fp")),
    ("observed_no_actions", ("fn", "tn")),
    ("observed", ("observed_actions", "observed_no_actions")),
    ("finals", ("overrides", "followed")),
)
_SHADOW_RELATIONS: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("n", ("actions", "no_actions")),
    ("n", ("differs", "agrees")),
    ("observed", ("positives", "negatives")),
    ("positives", ("tp", "fn")),
    ("negatives", ("fp", "tn")),
    ("observed_actions", ("tp", "fp")),
    ("observed_no_actions", ("fn", "tn")),
    ("observed", ("observed_actions", "observed_no_actions")),
)
TOTALLED = ("n", "observed", "finals")


class CountVisibility:
    """Which counts of a version may be published (all of them in the internal view)."""

    def __init__(
        self,
        cells: Mapping[str, CellCounts],
        shadows: Mapping[int, Mapping[str, ShadowCounts]],
        suppressing: bool,
        bins: Mapping[str, Sequence[int]] | None = None,
    ) -> None:
        values: dict[tuple[str, ...], int] = {}
        relations: list[tuple[tuple[str, ...], list[tuple[str, ...]]]] = []
        for g, cell in cells.items():
            for name, value in cell.all_counts().items():
                values[("cell", g, name)] = value
            for parent, children in _CELL_RELATIONS:
                relations.append((("cell", g, parent), [("cell", g, c) for c in children]))
        for name in TOTALLED:
            values[("total", name)] = sum(c.all_counts()[name] for c in cells.values())
            relations.append((("total", name), [("cell", g, name) for g in cells]))
        for sv, shadow_cells in shadows.items():
            for g, sc in shadow_cells.items():
                key = f"shadow-{sv}"
                for name, value in sc.all_counts().items():
                    values[(key, g, name)] = value
                for parent, children in _SHADOW_RELATIONS:
                    relations.append(((key, g, parent), [(key, g, c) for c in children]))
        for g, counts in (bins or {}).items():
            bin_keys: list[tuple[str, ...]] = [("bin", g, str(i)) for i in range(len(counts))]
            for bin_key, value in zip(bin_keys, counts, strict=True):
                values[bin_key] = value
            if g in cells and sum(counts) == cells[g].observed:
                relations.append((("cell", g, "observed"), bin_keys))
        self.values = values
        self.suppressing = suppressing
        if suppressing:
            self.visibility = suppress(values, relations)
        else:
            self.visibility = dict.fromkeys(values, Visibility.SHOWN)

    def hidden(self, *key: str) -> bool:
        return self.visibility[key] is not Visibility.SHOWN

    def shown(self, *key: str) -> PublishedCount:
        value = published(self.values[key], self.visibility[key])
        return value if value is None or isinstance(value, int) else "<11"

    def any_hidden(self, figures: Sequence[tuple[str, str]]) -> bool:
        return any(
            self.hidden("cell", g, name) for g, name in figures if ("cell", g, name) in self.values
        )


def estimate_of(r: Rate, hidden: bool) -> Estimate:
    if r.missing is not None:
        missing = "not-identifiable" if r.missing == "not-identifiable" else "no-cases"
        return Estimate(withheld=missing)
    if hidden:
        return Estimate(withheld="small-cell")
    return Estimate(value=r.value, low=r.low, high=r.high)
