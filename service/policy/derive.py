"""Deriving a policy from calibration data: ROC curves, their hulls and one linear program.

For each population that gets its own rule (a *unit*, see :mod:`service.policy.units`) the
empirical ROC over all distinct cuts plus never-act (0, 0) and always-act (1, 1) comes from
one shared sort and cumulative sums. Mixing cuts at random reaches every point between the
ROC's upper convex hull and the chance diagonal (Hardt, Price & Srebro 2016, section 4), so
the search is over convex weights of the hull vertices of every unit at once, in ONE linear
program (:mod:`service.policy.derive_lp`): every criterion is a set of linear constraints
on (FPR, TPR) and the objective is the expected cost per case, (c_FP E[FP] + c_FN E[FN]) / N.

**What a fallback unit promises.** The criterion constrains every unit's rates on its
FITTING population: a parent unit on the whole parent population (all its children, large
ones included), the default unit on the pooled rows of the groups that use it. It does NOT
constrain the rates of the groups a fallback unit governs. So after solving, every group's
rates are computed under the rule it actually uses, and a group that uses a fallback rule
and misses the criterion on the calibration data is named in ``Solution.outside_promise``.
It is compared with the groups that have their own rule (whose rates the LP holds exactly;
every other group when none has): for a gap criterion, it misses when a constrained rate is
more than the tolerance away from one of theirs; for four-fifths, when its favourable rate
is below 0.8 times the comparator's (the reference group's, else the highest of theirs), or,
being above all of theirs, puts the lowest of theirs below 0.8 times its own. Expected cost
and capacity are counted exactly on the governed rows.

Each own unit's optimum (FPR, TPR) becomes a band or a mixture of two bands
(:func:`service.policy.mixture.cut_mixture`); a fallback unit's rule is the mixture of its
vertex cuts with the LP's weights, exact on the rows it governs. Every rule's rates on its
fitting population are recomputed from the ROC curve and must match the LP point.

``single-cut`` fits one rule on the pooled data of all groups (the same LP with a single
unit): the group-blind cost-minimizing rule.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.policy.derive_lp import FOUR_FIFTHS, solve_lp
from service.policy.document import Rule
from service.policy.errors import InternalDeriveError
from service.policy.mixture import LpPoint, rule_for_point, rule_from_weights
from service.policy.rates import ExpectedCounts, rule_bands
from service.policy.targets import Criterion
from service.policy.units import POOLED_UNIT, DeriveError, Prepared, Unit

FRONTIER_TOLERANCES = (0.0, 0.01, 0.02, 0.05, 0.1)
CHECK_TOLERANCE = 1e-9
"""How far a rule's recomputed rates may be from the LP point (rounding only)."""

GAP_RATES: dict[Criterion, tuple[str, ...]] = {
    Criterion.DEMOGRAPHIC_PARITY: ("action_rate",),
    Criterion.EQUAL_OPPORTUNITY: ("tpr",),
    Criterion.PREDICTIVE_EQUALITY: ("fpr",),
    Criterion.EQUALIZED_ODDS: ("tpr", "fpr"),
}
"""The rates each gap criterion bounds between groups."""

RATE_NAMES = {
    "action_rate": "action rate",
    "tpr": "TPR",
    "fpr": "FPR",
    "favourable": "favourable rate",
}


@dataclass(frozen=True)
class GroupResult:
    key: str
    rule_key: str
    counts: ExpectedCounts  # length-1 arrays, on the fitted rows of the group

    @property
    def n(self) -> int:
        return round(float(self.counts.n[0]))


@dataclass(frozen=True)
class Solution:
    criterion: Criterion
    tolerance: float
    capacity: float | None
    reference_group: str | None
    rules: dict[str, Rule]  # unit key -> rule
    points: dict[str, LpPoint]
    groups: list[GroupResult]
    expected_cost: float  # recomputed from the rules on the data
    lp_cost: float
    action_rate: float  # overall, over all fitted rows
    outside_promise: dict[str, str]

    def rule_of(self, group: str) -> Rule:
        key = next(g.rule_key for g in self.groups if g.key == group)
        return self.rules[key]


def _check_options(tolerance: float, capacity: float | None) -> None:
    if not (np.isfinite(tolerance) and 0.0 <= tolerance <= 1.0):
        raise DeriveError(f"tolerance must be a number in [0, 1], got {tolerance}", "tolerance")
    if capacity is not None and not (np.isfinite(capacity) and 0.0 < capacity <= 1.0):
        raise DeriveError(f"capacity must be in (0, 1], got {capacity}", "capacity")


def _reference_index(prepared: Prepared, units: Sequence[Unit], group: str) -> int:
    if group not in prepared.rule_key_of:
        raise DeriveError(f"reference group {group!r} is not a group in the data", "reference")
    key = prepared.rule_key_of[group]
    if key != group:
        raise DeriveError(
            f"reference group {group!r} uses the fallback rule {key!r}: the reference "
            "(gaps are taken against it, and it is the four-fifths comparator) must be a group "
            "with its own rule",
            "reference",
        )
    return next(i for i, u in enumerate(units) if u.key == key)


def solve(
    prepared: Prepared,
    criterion: Criterion,
    tolerance: float = 0.0,
    *,
    capacity: float | None = None,
    reference_group: str | None = None,
) -> Solution:
    """Rules for every unit under ``criterion``, checked against the data they came from.

    ``capacity`` caps the overall action rate; ``reference_group`` is the four-fifths
    comparator (default: the highest favourable rate).
    """
    _check_options(tolerance, capacity)
    low = prepared.settings.score_range[0]
    single = criterion is Criterion.SINGLE_CUT
    units = [prepared.pooled] if single else prepared.units
    reference = None
    if reference_group is not None:
        index = _reference_index(prepared, prepared.units, reference_group)
        reference = index if criterion is Criterion.FOUR_FIFTHS else None
    lp = solve_lp(
        units,
        criterion,
        tolerance,
        prepared.settings,
        prepared.n_rows,
        capacity=capacity,
        reference=reference,
    )
    rules: dict[str, Rule] = {}
    for unit, weights, point in zip(units, lp.weights, lp.points, strict=True):
        if unit.fitted_on_governed:
            rule = rule_for_point(unit.hull, point, low)
        else:
            rule = rule_from_weights(unit.hull, weights, low)
        _check_rule(unit, rule, point)
        rules[unit.key] = rule

    groups: list[GroupResult] = []
    for key, curve in zip(prepared.data.group_keys, prepared.curves, strict=True):
        rule_key = POOLED_UNIT if single else prepared.rule_key_of[key]
        groups.append(GroupResult(key, rule_key, rule_bands(rules[rule_key], curve).counts()))
    tp = sum(float(g.counts.tp[0]) for g in groups)
    fp = sum(float(g.counts.fp[0]) for g in groups)
    fn = sum(float(g.counts.fn[0]) for g in groups)
    settings = prepared.settings
    cost = (settings.cost_fp * fp + settings.cost_fn * fn) / prepared.n_rows
    action_rate = (tp + fp) / prepared.n_rows
    if capacity is not None and action_rate > capacity + CHECK_TOLERANCE:
        raise InternalDeriveError(
            f"the rules act on {action_rate:.6f} of the rows, above the "
            f"capacity {capacity:g} the LP kept"
        )
    outside = outside_promise(prepared, criterion, tolerance, reference_group, groups)
    return Solution(
        criterion,
        tolerance,
        capacity,
        reference_group,
        rules,
        {u.key: p for u, p in zip(units, lp.points, strict=True)},
        groups,
        cost,
        lp.cost,
        action_rate,
        outside,
    )


def _check_rule(unit: Unit, rule: Rule, point: LpPoint) -> None:
    """Refuse a rule whose rates on the unit's fitting population miss the LP point."""
    counts = rule_bands(rule, unit.curve).counts()
    gap = max(abs(float(counts.fpr[0]) - point.fpr), abs(float(counts.tpr[0]) - point.tpr))
    if gap > CHECK_TOLERANCE:
        raise InternalDeriveError(f"the rule for {unit.key!r} misses the LP point by {gap:.3g}")


def group_rates(counts: ExpectedCounts, favourable: str) -> dict[str, float]:
    """The rates the criteria compare, NaN where undefined."""
    action = float(counts.action_rate[0])
    return {
        "action_rate": action,
        "tpr": float(counts.tpr[0]),
        "fpr": float(counts.fpr[0]),
        "favourable": action if favourable == "action" else 1.0 - action,
    }


def outside_promise(
    prepared: Prepared,
    criterion: Criterion,
    tolerance: float,
    reference_group: str | None,
    groups: Sequence[GroupResult],
) -> dict[str, str]:
    """Groups using a fallback rule that miss the criterion on the calibration data, and why.

    A fallback group is compared with the groups whose rules the LP constrains exactly (those
    with their own rule; every other group when there are none), never with another fallback
    group; see the module docstring for the conditions. Checks allow 1e-9 for rounding.
    """
    fallback = [g for g in groups if g.rule_key != g.key and g.rule_key != POOLED_UNIT]
    if not fallback or (criterion not in GAP_RATES and criterion is not Criterion.FOUR_FIFTHS):
        return {}
    favourable = prepared.settings.favourable
    rates = {g.key: group_rates(g.counts, favourable) for g in groups}
    own = [g.key for g in groups if g.rule_key == g.key]
    names = GAP_RATES.get(criterion, ("favourable",))
    out: dict[str, str] = {}
    for g in fallback:
        unit = prepared.unit(g.rule_key)
        uses = (
            f"uses the {unit.kind} rule {unit.key!r} (fitted on {unit.fitted_n} rows of "
            f"{', '.join(unit.fitted_on)})"
        )
        mine = rates[g.key]
        undefined = [RATE_NAMES[n] for n in names if np.isnan(mine[n])]
        if undefined:
            out[g.key] = f"{uses}; its {', '.join(undefined)} is undefined on the calibration data"
            continue
        peers = own or [h for h in rates if h != g.key]
        for name in names:
            values = {h: rates[h][name] for h in peers if not np.isnan(rates[h][name])}
            reason = (
                _gap_miss(mine[name], values, tolerance, RATE_NAMES[name])
                if criterion in GAP_RATES
                else _four_fifths_miss(mine[name], values, reference_group)
            )
            if reason:
                out[g.key] = f"{uses}; on the calibration data {reason}"
                break
    return out


def _first_near(values: dict[str, float], target: float) -> str:
    """The first key, in group order, whose value is within rounding (``CHECK_TOLERANCE``)
    of ``target``: which of several equal rates a message names must not depend on the last
    digits of a float (rates the LP equalizes differ there)."""
    return next(k for k, v in values.items() if abs(v - target) <= CHECK_TOLERANCE)


def _gap_miss(mine: float, peers: dict[str, float], tolerance: float, what: str) -> str | None:
    if not peers:
        return None
    distance = {h: abs(v - mine) for h, v in peers.items()}
    gap = max(distance.values())
    if gap <= tolerance + CHECK_TOLERANCE:
        return None
    far = _first_near(distance, gap)
    return (
        f"its {what} {mine:.3f} is {gap:.3f} from {far}'s {peers[far]:.3f}, beyond the "
        f"tolerance {tolerance:g}"
    )


def _four_fifths_miss(
    mine: float, peers: dict[str, float], reference_group: str | None
) -> str | None:
    """Below 0.8 x the comparator (the reference, else the highest peer); or, above every
    peer, high enough to put the lowest peer below 0.8 x its own rate."""
    if not peers:
        return None
    line = FOUR_FIFTHS - CHECK_TOLERANCE
    if reference_group is not None and reference_group in peers:
        top, best = reference_group, peers[reference_group]
    else:
        best = max(peers.values())
        top = _first_near(peers, best)
    whose = "the reference group" if top == reference_group else "the highest,"
    if best > 0 and mine / best < line:
        return (
            f"its favourable rate {mine:.3f} is {mine / best:.3f} of {whose} "
            f"{top}'s {best:.3f}, below 0.8"
        )
    if reference_group is None and mine > best:
        lowest = min(peers.values())
        if lowest / mine < line:
            low = _first_near(peers, lowest)
            return (
                f"its favourable rate {mine:.3f} is above every other and puts {low} "
                f"({lowest:.3f}) at {lowest / mine:.3f} of it, below 0.8"
            )
    return None


def frontier(
    prepared: Prepared,
    criterion: Criterion,
    tolerances: Sequence[float] = FRONTIER_TOLERANCES,
    *,
    capacity: float | None = None,
    reference_group: str | None = None,
) -> list[tuple[float, float | None]]:
    """In-sample expected cost of ``criterion`` at each tolerance (None where it cannot be met)."""
    out: list[tuple[float, float | None]] = []
    for tol in tolerances:
        try:
            sol = solve(
                prepared, criterion, tol, capacity=capacity, reference_group=reference_group
            )
        except DeriveError:
            out.append((tol, None))
            continue
        out.append((tol, sol.expected_cost))
    return out
