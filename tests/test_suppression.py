"""Small-cell suppression: no count from 1 to 10 is shown, nor can one be worked out."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from service.audit.realized import CellCounts
from service.audit.suppression import Visibility, published, suppress

CELL_RELATIONS = [
    ("n", ["actions", "no_actions"]),
    ("n", ["observed", "unobserved"]),
    ("observed", ["positives", "negatives"]),
    ("positives", ["tp", "fn"]),
    ("negatives", ["fp", "tn"]),
    ("observed_actions", ["tp", "fp"]),
    ("observed_no_actions", ["fn", "tn"]),
    ("observed", ["observed_actions", "observed_no_actions"]),
]


def determined(values: dict[str, int], relations: list, vis: dict[str, Visibility]) -> set[str]:
    """Hidden cells whose value follows from the published ones by linear algebra.

    Each relation is an equation sum(children) - parent = 0; moving the published values to
    the right-hand side leaves a system in the hidden ones. A hidden cell is pinned down iff
    its unit vector lies in the row space of that system (common practice in statistical
    disclosure control: the cell is exactly derivable).
    """
    hidden = sorted(k for k, v in vis.items() if v is not Visibility.SHOWN)
    if not hidden:
        return set()
    index = {k: i for i, k in enumerate(hidden)}
    rows = []
    for parent, children in relations:
        row = np.zeros(len(hidden))
        for k, coef in [(parent, -1.0), *[(c, 1.0) for c in children]]:
            if k in index:
                row[index[k]] += coef
        if row.any():
            rows.append(row)
    a = np.array(rows) if rows else np.zeros((0, len(hidden)))
    rank = np.linalg.matrix_rank(a) if len(a) else 0
    out = set()
    for k, i in index.items():
        e = np.zeros(len(hidden))
        e[i] = 1.0
        if np.linalg.matrix_rank(np.vstack([a, e])) == rank:
            out.add(k)
    return out


def test_small_counts_are_labelled_and_zero_is_shown() -> None:
    vis = suppress({"a": 0, "b": 10, "c": 11}, [])
    assert vis == {"a": Visibility.SHOWN, "b": Visibility.SMALL, "c": Visibility.SHOWN}
    # CMS Cell Size Suppression Policy: values 1 to 10 are not shown; zero may be.
    assert published(0, vis["a"]) == 0
    assert published(10, vis["b"]) == "<11"
    assert published(11, vis["c"]) == 11


def test_complement_of_a_small_cell_is_hidden() -> None:
    values = {"n": 200, "actions": 5, "no_actions": 195}
    vis = suppress(values, [("n", ["actions", "no_actions"])])
    assert vis["actions"] is Visibility.SMALL
    # 200 - 195 would give 5 back: one more member must go.
    assert sum(v is not Visibility.SHOWN for v in vis.values()) == 2


@settings(max_examples=300, deadline=None)
@given(
    n=st.integers(0, 80),
    a=st.floats(0, 1),
    o=st.floats(0, 1),
    p=st.floats(0, 1),
    t=st.floats(0, 1),
    f=st.floats(0, 1),
)
def test_no_small_count_can_be_derived(
    n: int, a: float, o: float, p: float, t: float, f: float
) -> None:
    observed = round(n * o)
    positives = round(observed * p)
    tp = round(positives * t)
    fp = round((observed - positives) * f)
    actions = min(n, tp + fp + round((n - observed) * a))
    counts = CellCounts(
        n=n, actions=actions, observed=observed, positives=positives, tp=tp, fp=fp
    ).all_counts()
    values = {k: v for k, v in counts.items() if k not in ("finals", "overrides", "followed")}
    vis = suppress(values, CELL_RELATIONS)
    small = {k for k, v in values.items() if 0 < v < 11}
    assert {k for k, v in vis.items() if v is Visibility.SMALL} == small
    assert not (determined(values, CELL_RELATIONS, vis) & small)
