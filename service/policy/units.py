"""Calibration data, derive settings, and the units: which rule each group uses, fitted on what.

A *unit* is a population that gets one rule. Every unit has a **fitting population** (the
rows its ROC curve and hull come from, and on which the criterion constrains its rates) and
the **groups it governs** (the groups whose cases its rule will decide):

- ``own``: a group with at least ``min_group_size`` rows and both outcomes. Fitted on its own
  rows; governs itself.
- ``parent`` (``fallback="parent"``): the nearest parent group (drop attributes from the
  right) whose whole population has at least ``min_group_size`` rows and both outcomes.
  Fitted on EVERY row of the parent population (its large children included); governs only
  the children that fall back to it (small groups, or groups with one outcome class).
- ``default`` (``fallback="default"``, or when no parent qualifies): fitted on the pooled rows
  of the groups that use it; governs exactly those groups.
- ``pooled`` (``single-cut``): fitted on all rows; governs every group.

So a fallback unit meets the criterion on its fitting population, not necessarily on the
groups it governs: :func:`service.policy.derive.solve` computes every group's rates under
the rule it actually uses and names the groups that miss. Cost and capacity are counted on
the governed rows exactly (``governed_tp``/``governed_fp``: the governed positives and
negatives scored at or above each hull cut).

Rows are sorted by score once per data set (:attr:`CalibrationData.order`); every fit on a
subset of rows (a cross-fitting fold) reads its curves off that order without sorting again.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Literal

import numpy as np
import numpy.typing as npt

from service.policy.document import GROUP_SEPARATOR
from service.policy.errors import PolicyError
from service.policy.roc import Hull, IntArray, RocCurve, counts_at, hull_of, roc_from_sorted

FloatArray = npt.NDArray[np.float64]
IntpArray = npt.NDArray[np.intp]
BoolArray = npt.NDArray[np.bool_]

DEFAULT_UNIT = "default"
POOLED_UNIT = "*"

FallbackMode = Literal["none", "parent", "default"]
Favourable = Literal["action", "no-action"]
UnitKind = Literal["own", "parent", "default", "pooled"]


class DeriveError(PolicyError):
    """Calibration data or settings that no policy can be derived from."""

    code = "derive_error"


@dataclass(frozen=True)
class ScoreOrder:
    """Rows by descending score: all of them, and each group's (same order)."""

    everything: IntpArray
    by_group: list[IntpArray]
    scores: list[FloatArray]  # scores of by_group[g], gathered once
    outcomes: list[npt.NDArray[np.int8]]


@dataclass(frozen=True)
class CalibrationData:
    """Rows of calibration data; ``group_codes[i]`` indexes ``group_keys``."""

    scores: FloatArray
    outcomes: npt.NDArray[np.int8]
    group_codes: npt.NDArray[np.intp]
    group_keys: list[str]
    attributes: list[str]

    def subset(self, rows: npt.NDArray[np.intp] | BoolArray) -> CalibrationData:
        """The same groups (same codes) restricted to ``rows``."""
        return CalibrationData(
            self.scores[rows],
            self.outcomes[rows],
            self.group_codes[rows],
            self.group_keys,
            self.attributes,
        )

    @cached_property
    def order(self) -> ScoreOrder:
        """The one sort every fit on these rows shares."""
        everything = np.argsort(-self.scores, kind="stable").astype(np.intp)
        grouped = everything[np.argsort(self.group_codes[everything], kind="stable")]
        bounds = np.searchsorted(
            self.group_codes[grouped], np.arange(len(self.group_keys) + 1), side="left"
        )
        by_group = [grouped[bounds[g] : bounds[g + 1]] for g in range(len(self.group_keys))]
        return ScoreOrder(
            everything,
            by_group,
            [self.scores[r] for r in by_group],
            [self.outcomes[r] for r in by_group],
        )


def group_curves(data: CalibrationData, keep: BoolArray | None = None) -> list[RocCurve]:
    """Each group's ROC on its rows (only rows where ``keep`` is true, if given)."""
    order = data.order
    curves = []
    for rows, s, y in zip(order.by_group, order.scores, order.outcomes, strict=True):
        if keep is not None:
            mask = keep[rows]
            s, y = s[mask], y[mask]
        curves.append(roc_from_sorted(s, y))
    return curves


@dataclass(frozen=True)
class DeriveSettings:
    cost_fp: float
    cost_fn: float
    favourable: Favourable = "action"
    min_group_size: int = 1
    fallback: FallbackMode = "none"
    score_range: tuple[float, float] = (0.0, 1.0)


@dataclass(frozen=True)
class Unit:
    """A population that gets one rule (see the module docstring)."""

    key: str
    kind: UnitKind
    members: tuple[str, ...]  # the groups it governs
    fitted_on: tuple[str, ...]  # the groups whose rows it is fitted on
    curve: RocCurve  # of the fitting population
    hull: Hull
    governed_tp: IntArray  # governed positives scored >= each hull cut
    governed_fp: IntArray  # governed negatives scored >= each hull cut
    governed_n: int
    governed_positives: int

    @property
    def fitted_n(self) -> int:
        return self.curve.positives + self.curve.negatives

    @property
    def fitted_on_governed(self) -> bool:
        """True when the rows it is fitted on are exactly the rows it decides (all but a
        parent unit, which is fitted on children that have rules of their own)."""
        return self.fitted_on == self.members


@dataclass(frozen=True)
class Prepared:
    """Everything that does not depend on the criterion: computed once, solved many times."""

    data: CalibrationData
    settings: DeriveSettings
    units: list[Unit]
    pooled: Unit
    curves: list[RocCurve]  # each group's ROC on the fitted rows
    rule_key_of: dict[str, str]
    n_rows: int  # rows fitted on
    notes: list[str] = field(default_factory=list)

    def unit(self, key: str) -> Unit:
        return self.pooled if key == POOLED_UNIT else next(u for u in self.units if u.key == key)


def _one_class(curve: RocCurve) -> str | None:
    if curve.positives == 0:
        return "positive"
    if curve.negatives == 0:
        return "negative"
    return None


def _parents(key: str) -> list[str]:
    """Parent keys of a group, nearest first: ``a|b|c`` -> ``a|b``, ``a``."""
    parts = key.split(GROUP_SEPARATOR)
    return [GROUP_SEPARATOR.join(parts[:length]) for length in range(len(parts) - 1, 0, -1)]


def prepare(
    data: CalibrationData,
    settings: DeriveSettings,
    *,
    fit: BoolArray | None = None,
    assignment: Mapping[str, str] | None = None,
) -> Prepared:
    """Check the groups, decide which rule each uses, and build every unit's ROC hull.

    ``fit`` restricts fitting to the rows where it is true (a cross-fitting fold). With
    ``assignment`` (a full fit's ``rule_key_of``) every group keeps the rule it uses there,
    except that a group left with one outcome class among the fitted rows falls back as
    any one-class group does.
    """
    keys = data.group_keys
    curves = group_curves(data, fit)
    n_rows = sum(c.positives + c.negatives for c in curves)
    if n_rows == 0:
        raise DeriveError("the calibration data has no rows")
    sizes = {k: c.positives + c.negatives for k, c in zip(keys, curves, strict=True)}
    missing = {k: _one_class(c) for k, c in zip(keys, curves, strict=True)}
    minimum = settings.min_group_size
    if assignment is None:
        falling = [k for k in keys if sizes[k] < minimum or missing[k] is not None]
    else:
        falling = [k for k in keys if assignment[k] == k and missing[k] is not None]
    if settings.fallback == "none":
        for k in falling:
            if missing[k] is not None:
                raise DeriveError(
                    f"group {k!r} has no {missing[k]} outcomes "
                    f"(y = {1 if missing[k] == 'positive' else 0}) and no fallback is set "
                    "(use --fallback parent or --fallback default)",
                    field=k,
                )
            raise DeriveError(
                f"group {k!r} has {sizes[k]} rows, below --min-group-size {minimum}, "
                "and no fallback is set (use --fallback parent or --fallback default)",
                field=k,
            )

    code_of = {k: c for c, k in enumerate(keys)}
    population: dict[str, list[int]] = {}
    for code, key in enumerate(keys):
        for parent in _parents(key):
            population.setdefault(parent, []).append(code)

    def fits(parent: str) -> bool:
        pos = sum(curves[c].positives for c in population[parent])
        neg = sum(curves[c].negatives for c in population[parent])
        return pos + neg >= minimum and pos > 0 and neg > 0

    rule_key_of = dict(assignment) if assignment is not None else {k: k for k in keys}
    notes: list[str] = []
    for key in falling:
        target = DEFAULT_UNIT
        if settings.fallback == "parent":
            target = next((p for p in _parents(key) if fits(p)), DEFAULT_UNIT)
        rule_key_of[key] = target
        which = "default" if target == DEFAULT_UNIT else "parent"
        why = (
            f"has {sizes[key]} rows (< {minimum})"
            if missing[key] is None
            else f"has no {missing[key]} outcomes"
        )
        notes.append(f"group {key!r} {why}: it uses the {which} rule {target!r}")

    low = settings.score_range[0]
    units: list[Unit] = []
    for unit_key in dict.fromkeys(rule_key_of[k] for k in keys):
        members = tuple(k for k in keys if rule_key_of[k] == unit_key)
        if unit_key in code_of:
            kind: UnitKind = "own"
            fitted_on: tuple[str, ...] = (unit_key,)
            curve = curves[code_of[unit_key]]
        elif unit_key == DEFAULT_UNIT:
            kind, fitted_on = "default", members
            curve = _pooled_curve(data, [code_of[k] for k in members], fit)
            if assignment is None and curve.positives + curve.negatives < minimum:
                notes.append(
                    f"the default rule is fitted on only {curve.positives + curve.negatives} "
                    f"pooled rows (< {minimum}); treat its rates as rough"
                )
        else:
            kind, fitted_on = "parent", tuple(keys[c] for c in population[unit_key])
            curve = _pooled_curve(data, population[unit_key], fit)
        units.append(_make_unit(unit_key, kind, members, fitted_on, curve, curves, code_of, low))
    everyone = tuple(keys)
    pooled_curve = _pooled_curve(data, list(range(len(keys))), fit)
    pooled = _make_unit(
        POOLED_UNIT, "pooled", everyone, everyone, pooled_curve, curves, code_of, low
    )
    return Prepared(data, settings, units, pooled, curves, rule_key_of, n_rows, notes)


def _pooled_curve(data: CalibrationData, codes: Sequence[int], fit: BoolArray | None) -> RocCurve:
    """ROC of the rows of several groups, read off the shared descending order."""
    order = data.order.everything
    if len(codes) == len(data.group_keys):
        rows = order if fit is None else order[fit[order]]
    else:
        table = np.zeros(len(data.group_keys), dtype=bool)
        table[list(codes)] = True
        keep = table[data.group_codes[order]]
        if fit is not None:
            keep &= fit[order]
        rows = order[keep]
    return roc_from_sorted(data.scores[rows], data.outcomes[rows])


def _make_unit(
    key: str,
    kind: UnitKind,
    members: tuple[str, ...],
    fitted_on: tuple[str, ...],
    curve: RocCurve,
    curves: list[RocCurve],
    code_of: dict[str, int],
    low: float,
) -> Unit:
    which = _one_class(curve)
    if which is not None:
        what = {
            "own": f"group {key!r}",
            "parent": f"parent rule {key!r} (for groups {', '.join(members)})",
            "default": f"default rule (for groups {', '.join(members)})",
            "pooled": "the calibration data",
        }[kind]
        raise DeriveError(f"{what} has no {which} outcomes to fit on", field=key)
    hull = hull_of(curve, low)
    gov_tp = np.zeros(len(hull.cuts), dtype=np.int64)
    gov_fp = np.zeros(len(hull.cuts), dtype=np.int64)
    n = positives = 0
    for member in members:
        c = curves[code_of[member]]
        tp, fp = counts_at(c, hull.cuts)
        gov_tp += tp
        gov_fp += fp
        n += c.positives + c.negatives
        positives += c.positives
    return Unit(key, kind, members, fitted_on, curve, hull, gov_tp, gov_fp, n, positives)
