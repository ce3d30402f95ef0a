"""Counting one policy's month in the database: the only part of the audit that reads rows.

Cohort: recommendations of the policy issued in ``[start, end)``. Every count is computed in the
database, per (version, group, shadow version), over three tables that each carry the cohort
fields: recommendations, outcomes and final decisions (no join of the big tables). Only the
grouped totals, a few rows per cell, reach Python, which adds them up (integer sums, exact).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy import Table, and_, func, literal, select
from sqlalchemy.orm import Session

from service.audit.realized import CellCounts, ShadowCounts
from service.store.audit_models import FinalDecision, Outcome
from service.store.models import Recommendation

Progress = Callable[[str], None]


def quiet(_message: str) -> None:
    return None


def cast_table(t: Any) -> Table:
    assert isinstance(t, Table)
    return t


def _count_if(condition: Any) -> Any:
    # Aggregate FILTER (PostgreSQL; SQLite >= 3.30) is cheaper per row than SUM(CASE ...).
    return func.count().filter(condition)


def _float_sum(value: Any, condition: Any | None = None) -> Any:
    if condition is None:
        return func.sum(value)
    return func.sum(value).filter(condition)


def _recommendation_counts(t: Table) -> list[Any]:
    c = t.c
    return [
        func.count().label("n"),
        _count_if(c.action.is_(True)).label("actions"),
        _float_sum(c.probability).label("expected_actions"),
        func.count(c.shadow_action).label("shadow_n"),
        _count_if(c.shadow_action.is_(True)).label("shadow_actions"),
        _count_if(c.shadow_action != c.action).label("differs"),
    ]


def _outcome_counts(t: Table) -> list[Any]:
    c = t.c
    acted, shadow_acted = c.action.is_(True), c.shadow_action.is_(True)
    return [
        func.count().label("observed"),
        _count_if(c.outcome == 1).label("positives"),
        _count_if(and_(acted, c.outcome == 1)).label("tp"),
        _count_if(and_(acted, c.outcome == 0)).label("fp"),
        _float_sum(c.probability, c.outcome == 0).label("expected_fp"),
        _float_sum(1.0 - c.probability, c.outcome == 1).label("expected_fn"),
        func.count(c.shadow_action).label("shadow_observed"),
        _count_if(and_(c.shadow_action.is_not(None), c.outcome == 1)).label("shadow_positives"),
        _count_if(and_(shadow_acted, c.outcome == 1)).label("shadow_tp"),
        _count_if(and_(shadow_acted, c.outcome == 0)).label("shadow_fp"),
    ]


def _final_counts(t: Table) -> list[Any]:
    return [
        func.count().label("finals"),
        _count_if(t.c.overridden.is_(True)).label("overrides"),
    ]


_SOURCES: tuple[tuple[str, Table, Callable[[Table], list[Any]]], ...] = (
    ("recommendations", cast_table(Recommendation.__table__), _recommendation_counts),
    ("outcomes", cast_table(Outcome.__table__), _outcome_counts),
    ("final decisions", cast_table(FinalDecision.__table__), _final_counts),
)
_INT_FIELDS = (
    "n",
    "actions",
    "shadow_n",
    "shadow_actions",
    "differs",
    "observed",
    "positives",
    "tp",
    "fp",
    "shadow_observed",
    "shadow_positives",
    "shadow_tp",
    "shadow_fp",
    "finals",
    "overrides",
)
_FLOAT_FIELDS = ("expected_actions", "expected_fp", "expected_fn")


def _in_cohort(t: Table, policy: str, start: datetime, end: datetime) -> Any:
    return and_(t.c.policy == policy, t.c.issued_at >= start, t.c.issued_at < end)


@dataclass
class _Tally:
    ints: dict[str, int] = field(default_factory=lambda: dict.fromkeys(_INT_FIELDS, 0))
    floats: dict[str, float] = field(default_factory=lambda: dict.fromkeys(_FLOAT_FIELDS, 0.0))

    def add(self, row: Any) -> None:
        for name, value in row._mapping.items():
            if name in self.ints:
                self.ints[name] += int(value or 0)
            elif name in self.floats:
                self.floats[name] += float(value or 0.0)


Key = tuple[int, str, int | None]


_FLAGS: dict[str, tuple[str, ...]] = {
    "recommendations": ("action", "shadow_action"),
    "outcomes": ("action", "shadow_action", "outcome"),
    "final decisions": ("overridden",),
}
"""Columns the grouped path adds to the GROUP BY, so each row costs one hash lookup and two
aggregates instead of a dozen filtered ones; the tallies follow from the finer cells."""


def _tally_from_flags(label: str, fine: Any, tally: _Tally) -> None:
    """Add one finer cell (key + flag values, count, sum of probabilities) to a tally."""
    count, p_sum = int(fine.rows), float(fine.p_sum or 0.0)
    i = tally.ints
    if label == "final decisions":
        i["finals"] += count
        i["overrides"] += count if fine.overridden else 0
        return
    acted, shadow = bool(fine.action), fine.shadow_action
    if label == "recommendations":
        i["n"] += count
        i["actions"] += count if acted else 0
        tally.floats["expected_actions"] += p_sum
        if shadow is not None:
            i["shadow_n"] += count
            i["shadow_actions"] += count if shadow else 0
            i["differs"] += count if bool(shadow) != acted else 0
        return
    y = int(fine.outcome)
    i["observed"] += count
    i["positives"] += count * y
    i["tp"] += count if acted and y == 1 else 0
    i["fp"] += count if acted and y == 0 else 0
    if y == 0:
        tally.floats["expected_fp"] += p_sum
    else:
        tally.floats["expected_fn"] += count - p_sum
    if shadow is not None:
        i["shadow_observed"] += count
        i["shadow_positives"] += count * y
        i["shadow_tp"] += count if shadow and y == 1 else 0
        i["shadow_fp"] += count if shadow and y == 0 else 0


def _grouped_counts(
    session: Session, policy: str, start: datetime, end: datetime, progress: Progress
) -> dict[Key, _Tally]:
    """One GROUP BY per table over the month (hash aggregation, in parallel on PostgreSQL),
    by (version, group, shadow version) and the table's decision and outcome flags."""
    tallies: dict[Key, _Tally] = {}
    for label, t, _aggregates in _SOURCES:
        flags = [t.c[name] for name in _FLAGS[label]]
        keys = [t.c.version, t.c.group, t.c.shadow_version, *flags]
        p_sum = func.sum(t.c.probability) if label != "final decisions" else None
        stmt = (
            select(
                *keys,
                func.count().label("rows"),
                (p_sum if p_sum is not None else literal(0.0)).label("p_sum"),
            )
            .where(_in_cohort(t, policy, start, end))
            .group_by(*keys)
        )
        rows = 0
        for fine in session.execute(stmt):
            key = (int(fine.version), str(fine.group), fine.shadow_version)
            _tally_from_flags(label, fine, tallies.setdefault(key, _Tally()))
            rows += int(fine.rows)
        progress(f"  counted {label}: {rows:,}")
    return tallies


def _index_keys(session: Session, policy: str) -> list[Key]:
    """Every (version, group, shadow version) of the policy, found by seeking the audit index
    from one key to the next (a few lookups per key, however many rows there are)."""
    c = Recommendation.__table__.c
    base = c.policy == policy

    def smallest(column: Any, *where: Any) -> Any:
        return session.scalar(select(func.min(column)).where(base, *where))

    keys: list[Key] = []
    version = smallest(c.version)
    while version is not None:
        group = smallest(c.group, c.version == version)
        while group is not None:
            here = (c.version == version, c.group == group)
            if session.scalar(select(c.id).where(base, *here, c.shadow_version.is_(None)).limit(1)):
                keys.append((int(version), str(group), None))
            shadow = smallest(c.shadow_version, *here)
            while shadow is not None:
                keys.append((int(version), str(group), int(shadow)))
                shadow = smallest(c.shadow_version, *here, c.shadow_version > shadow)
            group = smallest(c.group, c.version == version, c.group > group)
        version = smallest(c.version, c.version > version)
    return keys


def _keyed_counts(
    session: Session, policy: str, start: datetime, end: datetime, progress: Progress
) -> dict[Key, _Tally]:
    """Per (version, group, shadow version), one aggregate over one range of each table's
    audit index. SQLite has no hash aggregation: a GROUP BY over a time range would first sort
    every row, while a range of an index in grouping order is read straight through."""
    tallies: dict[Key, _Tally] = {}
    keys = _index_keys(session, policy)
    rows = 0
    for i, (version, group, shadow) in enumerate(keys):
        tally = _Tally()
        for _label, t, aggregates in _SOURCES:
            where = [
                _in_cohort(t, policy, start, end),
                t.c.version == version,
                t.c.group == group,
                t.c.shadow_version.is_(None) if shadow is None else t.c.shadow_version == shadow,
            ]
            tally.add(session.execute(select(*aggregates(t)).where(*where)).one())
        if tally.ints["n"]:
            tallies[(version, group, shadow)] = tally
            rows += tally.ints["n"]
        progress(f"  counted cell {i + 1}/{len(keys)} (v{version} {group}): {rows:,} so far")
    return tallies


def count_month(
    session: Session, policy: str, start: datetime, end: datetime, progress: Progress = quiet
) -> dict[Key, _Tally]:
    """Counts of the cohort per (version, group, shadow version), all computed in SQL."""
    if session.get_bind().dialect.name == "sqlite":
        return _keyed_counts(session, policy, start, end, progress)
    return _grouped_counts(session, policy, start, end, progress)


def cells_from_tallies(
    tallies: dict[Key, _Tally],
) -> dict[int, tuple[dict[str, CellCounts], dict[int, dict[str, ShadowCounts]]]]:
    """Per version: the cell of each group (its shadow subgroups added up) and shadow cells."""
    merged: dict[tuple[int, str], _Tally] = {}
    shadows: dict[int, dict[int, dict[str, ShadowCounts]]] = {}
    for (version, group, shadow_version), t in tallies.items():
        m = merged.setdefault((version, group), _Tally())
        for name in _INT_FIELDS:
            m.ints[name] += t.ints[name]
        for name in _FLOAT_FIELDS:
            m.floats[name] += t.floats[name]
        if shadow_version is not None and t.ints["shadow_n"]:
            shadows.setdefault(version, {}).setdefault(int(shadow_version), {})[group] = (
                ShadowCounts(
                    n=t.ints["shadow_n"],
                    actions=t.ints["shadow_actions"],
                    differs=t.ints["differs"],
                    observed=t.ints["shadow_observed"],
                    positives=t.ints["shadow_positives"],
                    tp=t.ints["shadow_tp"],
                    fp=t.ints["shadow_fp"],
                )
            )
    out: dict[int, tuple[dict[str, CellCounts], dict[int, dict[str, ShadowCounts]]]] = {}
    for (version, group), t in sorted(merged.items()):
        if not t.ints["n"]:
            continue
        cell = CellCounts(
            n=t.ints["n"],
            actions=t.ints["actions"],
            observed=t.ints["observed"],
            positives=t.ints["positives"],
            tp=t.ints["tp"],
            fp=t.ints["fp"],
            finals=t.ints["finals"],
            overrides=t.ints["overrides"],
            expected_actions=t.floats["expected_actions"],
            expected_fp=t.floats["expected_fp"],
            expected_fn=t.floats["expected_fn"],
        )
        out.setdefault(version, ({}, shadows.get(version, {})))[0][group] = cell
    return out
