"""Deriving a policy from calibration data: ROC curves, their hulls and one linear program.

For each population that gets its own rule (a *unit*: a group, a parent group that smaller
groups fall back to, or the pooled default), the empirical ROC over all distinct cuts plus
never-act (0, 0) and always-act (1, 1) is computed with one sort and cumulative sums. Mixing
cuts at random reaches every point between the ROC's upper convex hull and the chance
diagonal (Hardt, Price & Srebro 2016, section 4), so the search is over convex weights of the
hull vertices of every unit at once, in ONE linear program (scipy ``linprog``, HiGHS): every
criterion is a set of linear constraints on (FPR, TPR) and the objective is the expected cost
per case, (c_FP E[FP] + c_FN E[FN]) / N.

Each unit's optimum (FPR, TPR) is then turned into a rule. On the hull it is a band between
the cuts of two adjacent vertices; strictly inside (equalized odds often lands there) it is a
mixture of two such bands on a line of slope 1 through the point. Either way the rule is a
mixture of cuts, hence a non-decreasing step function. The rule's rates are recomputed
exactly on the data and must match the LP point.

``single-cut`` fits one rule on the pooled data of all groups (the same LP with a single
unit): the group-blind cost-minimizing rule.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import sparse
from scipy.optimize import linprog

from service.policy.document import (
    GROUP_SEPARATOR,
    Costs,
    Criterion,
    Fallback,
    Groups,
    GroupTarget,
    PolicyDocument,
    Rule,
    Step,
    Targets,
)
from service.policy.errors import PolicyError
from service.policy.rates import ExpectedCounts, expected_counts, expected_counts_by_group
from service.policy.roc import Hull, RocCurve, hull_of, roc_curve
from service.policy.rules import rule_probabilities

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

DEFAULT_UNIT = "default"
POOLED_UNIT = "*"
FOUR_FIFTHS = 0.8
FRONTIER_TOLERANCES = (0.0, 0.01, 0.02, 0.05, 0.1)
CHECK_TOLERANCE = 1e-9
"""How far the rule's recomputed rates may be from the LP point (rounding only)."""

FallbackMode = Literal["none", "parent", "default"]
Favourable = Literal["action", "no-action"]


class DeriveError(PolicyError):
    """Calibration data or settings that no policy can be derived from."""

    code = "derive_error"


# --- Problem, units and preparation -----------------------------------------------------


@dataclass(frozen=True)
class CalibrationData:
    """Rows of calibration data; ``group_codes[i]`` indexes ``group_keys``."""

    scores: FloatArray
    outcomes: npt.NDArray[np.int8]
    group_codes: npt.NDArray[np.intp]
    group_keys: list[str]
    attributes: list[str]

    def rows_of(self) -> list[npt.NDArray[np.intp]]:
        order = np.argsort(self.group_codes, kind="stable")
        bounds = np.searchsorted(self.group_codes[order], np.arange(len(self.group_keys) + 1))
        return [order[bounds[g] : bounds[g + 1]] for g in range(len(self.group_keys))]


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
    """A population that gets one rule.

    ``rows`` are the rows the rule is fitted on; ``members`` the known groups that use it;
    ``governed`` how many calibration rows it will decide (its weight in the objective).
    A parent unit is fitted on the whole parent population, standing in for its small
    children; a default unit on the pooled rows of the groups that use it.
    """

    key: str
    members: tuple[str, ...]
    rows: npt.NDArray[np.intp]
    governed: int
    curve: RocCurve
    hull: Hull
    scores: FloatArray  # data.scores[rows], gathered once for the checks of every criterion
    outcomes: FloatArray  # data.outcomes[rows] as floats


@dataclass(frozen=True)
class Prepared:
    """Everything that does not depend on the criterion: computed once, solved many times."""

    data: CalibrationData
    settings: DeriveSettings
    units: list[Unit]
    pooled: Unit
    group_rows: list[npt.NDArray[np.intp]]
    rule_key_of: dict[str, str]
    notes: list[str] = field(default_factory=list)


def _make_unit(
    data: CalibrationData,
    key: str,
    members: Sequence[str],
    rows: npt.NDArray[np.intp],
    governed: int,
    low: float,
) -> Unit:
    scores, outcomes = data.scores[rows], data.outcomes[rows]
    curve = roc_curve(scores, outcomes)
    if curve.positives == 0 or curve.negatives == 0:
        which = "positive" if curve.positives == 0 else "negative"
        raise DeriveError(
            f"fallback rule {key!r} (for groups {', '.join(members)}) has no {which} outcomes "
            "to fit on",
            field=key,
        )
    hull = hull_of(curve, low)
    return Unit(
        key, tuple(members), rows, governed, curve, hull, scores, outcomes.astype(np.float64)
    )


def prepare(data: CalibrationData, settings: DeriveSettings) -> Prepared:
    """Check the groups, decide which rule each uses, and build every unit's ROC hull."""
    if len(data.scores) == 0:
        raise DeriveError("the calibration data has no rows")
    low = settings.score_range[0]
    group_rows = data.rows_of()
    sizes = {k: len(r) for k, r in zip(data.group_keys, group_rows, strict=True)}
    for key, rows in zip(data.group_keys, group_rows, strict=True):
        positives = int(data.outcomes[rows].sum())
        if positives == 0:
            raise DeriveError(f"group {key!r} has no positive outcomes (y = 1)", field=key)
        if positives == len(rows):
            raise DeriveError(f"group {key!r} has no negative outcomes (y = 0)", field=key)

    notes: list[str] = []
    small = [k for k in data.group_keys if sizes[k] < settings.min_group_size]
    if small and settings.fallback == "none":
        k = small[0]
        raise DeriveError(
            f"group {k!r} has {sizes[k]} rows, below --min-group-size {settings.min_group_size}, "
            "and no fallback is set (use --fallback parent or --fallback default)",
            field=k,
        )
    rule_key_of = {k: k for k in data.group_keys if k not in small}
    parent_population: dict[str, list[int]] = {}
    for code, key in enumerate(data.group_keys):
        parts = key.split(GROUP_SEPARATOR)
        for length in range(1, len(parts)):
            parent_population.setdefault(GROUP_SEPARATOR.join(parts[:length]), []).append(code)
    for key in small:
        target = DEFAULT_UNIT
        if settings.fallback == "parent":
            parts = key.split(GROUP_SEPARATOR)
            for length in range(len(parts) - 1, 0, -1):
                parent = GROUP_SEPARATOR.join(parts[:length])
                if sum(sizes[data.group_keys[c]] for c in parent_population[parent]) >= (
                    settings.min_group_size
                ):
                    target = parent
                    break
        rule_key_of[key] = target
        notes.append(
            f"group {key!r} has {sizes[key]} rows (< {settings.min_group_size}): "
            f"it uses the {'default' if target == DEFAULT_UNIT else 'parent'} rule {target!r}"
        )

    units: list[Unit] = []
    code_of = {k: c for c, k in enumerate(data.group_keys)}
    for unit_key in dict.fromkeys(rule_key_of[k] for k in data.group_keys):
        members = [k for k in data.group_keys if rule_key_of[k] == unit_key]
        governed = sum(sizes[k] for k in members)
        if unit_key in code_of:
            rows = group_rows[code_of[unit_key]]
        elif unit_key == DEFAULT_UNIT:
            rows = np.concatenate([group_rows[code_of[k]] for k in members])
            if len(rows) < settings.min_group_size:
                notes.append(
                    f"the default rule is fitted on only {len(rows)} pooled rows "
                    f"(< {settings.min_group_size}); treat its rates as rough"
                )
        else:
            rows = np.concatenate([group_rows[c] for c in parent_population[unit_key]])
        units.append(_make_unit(data, unit_key, members, rows, governed, low))
    all_rows = np.arange(len(data.scores), dtype=np.intp)
    pooled = _make_unit(data, POOLED_UNIT, data.group_keys, all_rows, len(all_rows), low)
    return Prepared(data, settings, units, pooled, group_rows, rule_key_of, notes)


# --- The linear program -----------------------------------------------------------------


@dataclass(frozen=True)
class LpPoint:
    fpr: float
    tpr: float


def _constraint_quantities(criterion: Criterion, unit: Unit) -> list[tuple[str, FloatArray]]:
    """The per-vertex coefficients of each rate the criterion constrains, by kind."""
    prevalence = unit.curve.positives / len(unit.rows)
    action = prevalence * unit.hull.tpr + (1.0 - prevalence) * unit.hull.fpr
    if criterion is Criterion.DEMOGRAPHIC_PARITY:
        return [("gap", action)]
    if criterion is Criterion.EQUAL_OPPORTUNITY:
        return [("gap", unit.hull.tpr)]
    if criterion is Criterion.PREDICTIVE_EQUALITY:
        return [("gap", unit.hull.fpr)]
    if criterion is Criterion.EQUALIZED_ODDS:
        return [("gap", unit.hull.tpr), ("gap", unit.hull.fpr)]
    if criterion is Criterion.FOUR_FIFTHS:
        return [("ratio", action)]
    return []


def solve_lp(
    units: Sequence[Unit],
    criterion: Criterion,
    tolerance: float,
    settings: DeriveSettings,
    n_total: int,
) -> tuple[list[LpPoint], float]:
    """Minimise expected cost per case over convex weights of every unit's hull vertices.

    Constraints, for a rate q_u of each unit u (a linear function of its weights):
    - "gap" (every pairwise |q_u - q_v| <= eps): lo <= q_u <= hi for all u, hi - lo <= eps;
    - "ratio" (four-fifths on the favourable rate r_u, r_u >= 0.8 r_v - eps for all u, v):
      r_u <= M for all u and 0.8 M - r_u <= eps, M an auxiliary variable.

    Each unit's cost is weighted by the rows it governs. For a parent unit that is an
    estimate (its rates come from the whole parent population, its weight from the small
    groups using it); :func:`solve` always recomputes the expected cost exactly from the rules.
    """
    sizes = [len(u.hull.fpr) for u in units]
    offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(int)
    n_weights = int(offsets[-1])
    c_fp, c_fn = settings.cost_fp, settings.cost_fn

    cost = np.zeros(n_weights)
    constant = 0.0
    for u, unit in enumerate(units):
        share = unit.governed / n_total
        n = len(unit.rows)
        neg, pos = unit.curve.negatives / n, unit.curve.positives / n
        sl = slice(offsets[u], offsets[u + 1])
        cost[sl] = share * (c_fp * neg * unit.hull.fpr - c_fn * pos * unit.hull.tpr)
        constant += share * c_fn * pos

    per_unit = [_constraint_quantities(criterion, unit) for unit in units]
    n_sets = len(per_unit[0]) if per_unit else 0
    kinds = [per_unit[0][j][0] for j in range(n_sets)] if n_sets else []
    n_aux = sum(2 if kind == "gap" else 1 for kind in kinds)
    n_vars = n_weights + n_aux

    rows_i: list[npt.NDArray[np.intp]] = []
    cols_i: list[npt.NDArray[np.intp]] = []
    vals: list[FloatArray] = []
    b_ub: list[float] = []

    def add_row(cols: npt.NDArray[np.intp], values: FloatArray, bound: float) -> None:
        rows_i.append(np.full(len(cols), len(b_ub), dtype=np.intp))
        cols_i.append(cols)
        vals.append(values)
        b_ub.append(bound)

    aux = n_weights
    fav_sign = 1.0 if settings.favourable == "action" else -1.0
    for j, kind in enumerate(kinds):
        if kind == "gap":
            lo, hi = aux, aux + 1
            aux += 2
            for u in range(len(units)):
                cols = np.arange(offsets[u], offsets[u + 1], dtype=np.intp)
                q = per_unit[u][j][1]
                add_row(np.append(cols, hi), np.append(q, -1.0), 0.0)  # q_u - hi <= 0
                add_row(np.append(cols, lo), np.append(-q, 1.0), 0.0)  # lo - q_u <= 0
            add_row(np.array([hi, lo]), np.array([1.0, -1.0]), tolerance)
        else:
            top = aux
            aux += 1
            for u in range(len(units)):
                cols = np.arange(offsets[u], offsets[u + 1], dtype=np.intp)
                q = per_unit[u][j][1]
                # Favourable rate r_u = q_u (action) or 1 - q_u (no action); sum w = 1.
                r = q if fav_sign > 0 else 1.0 - q
                add_row(np.append(cols, top), np.append(r, -1.0), 0.0)  # r_u - M <= 0
                add_row(np.append(cols, top), np.append(-r, FOUR_FIFTHS), tolerance)

    a_eq = sparse.csr_matrix(
        (
            np.ones(n_weights),
            (np.repeat(np.arange(len(units)), sizes), np.arange(n_weights)),
        ),
        shape=(len(units), n_vars),
    )
    objective = np.concatenate([cost, np.zeros(n_aux)])
    a_ub = None
    if b_ub:
        a_ub = sparse.csr_matrix(
            (np.concatenate(vals), (np.concatenate(rows_i), np.concatenate(cols_i))),
            shape=(len(b_ub), n_vars),
        )
    result = linprog(
        objective,
        A_ub=a_ub,
        b_ub=np.array(b_ub) if b_ub else None,
        A_eq=a_eq,
        b_eq=np.ones(len(units)),
        bounds=(0.0, None),
        method="highs",
        options={"primal_feasibility_tolerance": 1e-10, "dual_feasibility_tolerance": 1e-10},
    )
    if result.status == 2:
        raise DeriveError(
            f"criterion {criterion.value!r} cannot be met at tolerance {tolerance:g}",
            field="tolerance",
        )
    if result.status != 0:
        raise DeriveError(f"the linear program failed: {result.message}", field="criterion")
    x = np.clip(result.x[:n_weights], 0.0, None)
    points = []
    for u, unit in enumerate(units):
        w = x[offsets[u] : offsets[u + 1]]
        w = w / w.sum()
        points.append(LpPoint(float(w @ unit.hull.fpr), float(w @ unit.hull.tpr)))
    return points, float(result.fun + constant)


# --- From an operating point to a rule --------------------------------------------------


def _on_line(hull: Hull, gain: FloatArray, k: int, level: float) -> tuple[float, float, float]:
    """Where segment (k, k+1) meets tpr - fpr = level: (fraction along it, fpr, tpr)."""
    g0, g1 = gain[k], gain[k + 1]
    frac = 0.0 if g1 == g0 else float(np.clip((level - g0) / (g1 - g0), 0.0, 1.0))
    f = hull.fpr[k] + frac * (hull.fpr[k + 1] - hull.fpr[k])
    t = hull.tpr[k] + frac * (hull.tpr[k + 1] - hull.tpr[k])
    return frac, float(f), float(t)


def cut_mixture(hull: Hull, point: LpPoint) -> list[tuple[float, float]]:
    """The point as a mixture of cuts: [(cut, weight)], weights summing to 1.

    The line tpr - fpr = const through the point meets the hull once where the hull rises
    above the diagonal (point A) and once where it falls back (point B); the point is
    between them, and each of A and B is a band between two adjacent vertices. On the hull
    the point is A or B itself, and the rule is a single band.
    """
    gain = hull.tpr - hull.fpr
    # The gain rises strictly, may stay level along one segment of slope 1 (the whole hull
    # when it is the chance diagonal: a group whose scores take one value), then falls
    # strictly. A is sought left of the first maximum, B right of the last one, so a level
    # segment is spanned by the pair (A, B) instead of being collapsed to its left end.
    first_peak = int(np.argmax(gain))
    last = len(gain) - 1
    last_peak = last - int(np.argmax(gain[::-1]))
    level = float(np.clip(point.tpr - point.fpr, 0.0, gain[first_peak]))
    if first_peak == 0:
        ka, frac_a, fa = 0, 0.0, float(hull.fpr[0])
    else:
        rising = gain[: first_peak + 1]
        ka = int(np.clip(np.searchsorted(rising, level, side="left") - 1, 0, first_peak - 1))
        frac_a, fa, _ = _on_line(hull, gain, ka, level)
    if last_peak == last:
        kb, frac_b, fb = last - 1, 1.0, float(hull.fpr[last])
    else:
        falling = gain[last_peak:][::-1]
        j = int(np.clip(np.searchsorted(falling, level, side="left") - 1, 0, len(falling) - 2))
        kb = last_peak + len(falling) - 2 - j
        frac_b, fb, _ = _on_line(hull, gain, kb, level)
    beta = 1.0 if fb - fa <= 1e-15 else float(np.clip((fb - point.fpr) / (fb - fa), 0.0, 1.0))
    mixture: dict[float, float] = {}
    for weight, k, frac in ((beta, ka, frac_a), (1.0 - beta, kb, frac_b)):
        for cut, w in ((hull.cuts[k], weight * (1.0 - frac)), (hull.cuts[k + 1], weight * frac)):
            # Weights below 1e-12 are rounding dust of beta or frac; they would only add
            # steps with probabilities like 1e-15 that change no rate measurably.
            if w > 1e-12 and np.isfinite(cut):
                mixture[float(cut)] = mixture.get(float(cut), 0.0) + w
    return sorted(mixture.items())


def rule_from_mixture(mixture: Sequence[tuple[float, float]], score_low: float) -> Rule:
    """A mixture of cuts as steps: P(action | s) = total weight of the cuts at or below s."""
    if not mixture:
        return Rule(steps=[Step(start=score_low, probability=0.0)])
    steps: list[Step] = []
    total = 0.0
    for cut, weight in mixture:
        total += weight
        steps.append(Step(start=cut, probability=min(1.0, total)))
    if steps[-1].probability > 1.0 - 1e-12:
        steps[-1] = Step(start=steps[-1].start, probability=1.0)
    return Rule(steps=steps)


def rule_for_point(hull: Hull, point: LpPoint, score_low: float) -> Rule:
    return rule_from_mixture(cut_mixture(hull, point), score_low)


# --- Solving a criterion ----------------------------------------------------------------


@dataclass(frozen=True)
class GroupResult:
    key: str
    rule_key: str
    counts: ExpectedCounts  # length-1 arrays

    @property
    def n(self) -> int:
        return round(float(self.counts.n[0]))


@dataclass(frozen=True)
class Solution:
    criterion: Criterion
    tolerance: float
    rules: dict[str, Rule]
    points: dict[str, LpPoint]
    groups: list[GroupResult]
    expected_cost: float
    lp_cost: float


def solve(prepared: Prepared, criterion: Criterion, tolerance: float = 0.0) -> Solution:
    """Rules for every unit under ``criterion``, checked against the data they came from."""
    if not (tolerance >= 0.0 and np.isfinite(tolerance)):
        raise DeriveError(f"tolerance must be a finite number >= 0, got {tolerance}", "tolerance")
    data, settings = prepared.data, prepared.settings
    low = settings.score_range[0]
    units = [prepared.pooled] if criterion is Criterion.SINGLE_CUT else prepared.units
    points, lp_cost = solve_lp(units, criterion, tolerance, settings, len(data.scores))
    rules: dict[str, Rule] = {}
    unit_probabilities: dict[str, FloatArray] = {}
    for unit, point in zip(units, points, strict=True):
        rule = rule_for_point(unit.hull, point, low)
        unit_probabilities[unit.key] = _check_rule(unit, rule, point)
        rules[unit.key] = rule

    groups: list[GroupResult] = []
    if criterion is Criterion.SINGLE_CUT:
        probabilities = unit_probabilities[POOLED_UNIT]  # the pooled unit is every row, in order
    else:
        probabilities = np.empty(len(data.scores))
        for key, rows in zip(data.group_keys, prepared.group_rows, strict=True):
            rule_key = prepared.rule_key_of[key]
            if rule_key == key:  # the group's own unit: same rows, already evaluated
                probabilities[rows] = unit_probabilities[key]
            else:
                probabilities[rows] = rule_probabilities(rules[rule_key], data.scores[rows])
    counts = expected_counts_by_group(
        probabilities, data.outcomes, data.group_codes, len(data.group_keys)
    )
    for g, key in enumerate(data.group_keys):
        rule_key = POOLED_UNIT if criterion is Criterion.SINGLE_CUT else prepared.rule_key_of[key]
        one = ExpectedCounts(
            counts.tp[g : g + 1], counts.fp[g : g + 1], counts.fn[g : g + 1], counts.tn[g : g + 1]
        )
        groups.append(GroupResult(key, rule_key, one))
    cost = float(counts.total().cost_per_case(settings.cost_fp, settings.cost_fn)[0])
    return Solution(
        criterion,
        tolerance,
        rules,
        {u.key: p for u, p in zip(units, points, strict=True)},
        groups,
        cost,
        lp_cost,
    )


def _check_rule(unit: Unit, rule: Rule, point: LpPoint) -> FloatArray:
    """The rule's probabilities on the unit's rows, once its rates are seen to match."""
    probabilities = rule_probabilities(rule, unit.scores)
    counts = expected_counts(probabilities, unit.outcomes)
    gap = max(abs(float(counts.fpr[0]) - point.fpr), abs(float(counts.tpr[0]) - point.tpr))
    if gap > CHECK_TOLERANCE:
        raise RuntimeError(
            f"internal error: the rule for {unit.key!r} misses the LP point by {gap:.3g}"
        )
    return probabilities


# --- Comparison and frontier ------------------------------------------------------------


@dataclass(frozen=True)
class ComparisonRow:
    criterion: Criterion
    expected_cost: float | None
    price: float | None
    note: str = ""


def compare(prepared: Prepared, tolerance: float) -> list[ComparisonRow]:
    """Every criterion at ``tolerance`` side by side; price = cost minus max-utility's."""
    base = solve(prepared, Criterion.MAX_UTILITY, tolerance).expected_cost
    rows: list[ComparisonRow] = []
    for criterion in Criterion:
        try:
            cost = solve(prepared, criterion, tolerance).expected_cost
        except DeriveError as exc:
            rows.append(ComparisonRow(criterion, None, None, exc.message))
            continue
        rows.append(ComparisonRow(criterion, cost, cost - base))
    return rows


def frontier(
    prepared: Prepared,
    criterion: Criterion,
    tolerances: Sequence[float] = FRONTIER_TOLERANCES,
) -> list[tuple[float, float | None]]:
    """Expected cost of ``criterion`` at each tolerance (None where it cannot be met)."""
    out: list[tuple[float, float | None]] = []
    for tol in tolerances:
        try:
            out.append((tol, solve(prepared, criterion, tol).expected_cost))
        except DeriveError:
            out.append((tol, None))
    return out


# --- The policy document ----------------------------------------------------------------


@dataclass(frozen=True)
class PolicyIdentity:
    name: str
    description: str
    score_meaning: str
    action_label: str
    no_action_label: str
    unknown_groups: Literal["fallback", "refuse"] = "refuse"


def build_document(
    prepared: Prepared, solution: Solution, identity: PolicyIdentity
) -> PolicyDocument:
    settings = prepared.settings
    if solution.criterion is Criterion.SINGLE_CUT:
        rule = solution.rules[POOLED_UNIT]
        rules = dict.fromkeys(prepared.data.group_keys, rule)
        fallback = Fallback(
            default=rule if identity.unknown_groups == "fallback" else None,
            unknown_groups=identity.unknown_groups,
        )
    else:
        rules = {k: r for k, r in solution.rules.items() if k != DEFAULT_UNIT}
        fallback = Fallback(
            use_parent=any(
                k not in prepared.data.group_keys and k != DEFAULT_UNIT for k in solution.rules
            ),
            default=solution.rules.get(DEFAULT_UNIT),
            unknown_groups=identity.unknown_groups,
        )
    targets = Targets(
        criterion=solution.criterion,
        tolerance=solution.tolerance,
        expected_cost=solution.expected_cost,
        groups={
            g.key: GroupTarget(
                n=g.n,
                prevalence=float(g.counts.prevalence[0]),
                action_rate=float(g.counts.action_rate[0]),
                tpr=float(g.counts.tpr[0]),
                fpr=float(g.counts.fpr[0]),
            )
            for g in solution.groups
        },
    )
    return PolicyDocument(
        name=identity.name,
        description=identity.description,
        score_meaning=identity.score_meaning,
        score_range=settings.score_range,
        action_label=identity.action_label,
        no_action_label=identity.no_action_label,
        favourable=settings.favourable,
        costs=Costs(false_positive=settings.cost_fp, false_negative=settings.cost_fn),
        groups=Groups(
            attributes=prepared.data.attributes, known=prepared.data.group_keys, fallback=fallback
        ),
        rules=rules,
        targets=targets,
    )
