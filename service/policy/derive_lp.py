"""The derive linear program: one HiGHS solve over the hull-vertex weights of every unit.

Variables: convex weights w_uk >= 0, sum_k w_uk = 1, of each unit u's upper-hull vertices
(f_uk, t_uk), plus a few auxiliary variables. Every rate of a unit's FITTING population that
is linear in (FPR, TPR) is linear in its weights (see DEVELOPERS.md, "Adding a criterion").

Objective: the expected cost per case over the N fitted rows,
    (1/N) sum_u sum_k w_uk (c_FP FP_uk + c_FN (P_u - TP_uk)),
with TP_uk, FP_uk the GOVERNED positives and negatives scored at or above vertex k's cut and
P_u the governed positives. For a unit fitted on the rows it governs these are its own hull
counts; for a fallback unit they are counted on the groups it governs, and the rule is then
the mixture of vertex cuts with exactly these weights, so the cost is exact either way.

Constraints on q_u, a rate of unit u's fitting population:
- "gap" (every pairwise |q_u - q_v| <= eps): lo <= q_u <= hi for all u, hi - lo <= eps;
- four-fifths on the favourable rate r_u (q_u, or 1 - q_u when no action is favourable),
  with no slack: r_u >= 0.8 r_c, c the comparator. With a reference unit c that is one
  row per other unit; without, c is the highest rate: r_u <= M and 0.8 M - r_u <= 0.
- capacity C: the overall action rate (1/N) sum_u sum_k w_uk (TP_uk + FP_uk) <= C.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import sparse
from scipy.optimize import linprog

from service.policy.mixture import LpPoint
from service.policy.targets import Criterion
from service.policy.units import DeriveError, DeriveSettings, FloatArray, Unit

FOUR_FIFTHS = 0.8


@dataclass(frozen=True)
class LpSolution:
    weights: list[FloatArray]  # per unit, summing to 1
    points: list[LpPoint]  # per unit, (FPR, TPR) on its fitting population
    cost: float  # expected cost per case of the optimum


def _constraint_quantities(criterion: Criterion, unit: Unit) -> list[tuple[str, FloatArray]]:
    """The per-vertex coefficients of each rate the criterion constrains, by kind."""
    prevalence = unit.curve.positives / unit.fitted_n
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
    *,
    capacity: float | None = None,
    reference: int | None = None,
) -> LpSolution:
    """Minimise expected cost per case; ``reference`` is the comparator unit's index."""
    sizes = [len(u.hull.fpr) for u in units]
    offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(int)
    n_weights = int(offsets[-1])
    c_fp, c_fn = settings.cost_fp, settings.cost_fn

    cost = np.zeros(n_weights)
    constant = 0.0
    for u, unit in enumerate(units):
        sl = slice(offsets[u], offsets[u + 1])
        cost[sl] = (c_fp * unit.governed_fp - c_fn * unit.governed_tp) / n_total
        constant += c_fn * unit.governed_positives / n_total

    per_unit = [_constraint_quantities(criterion, unit) for unit in units]
    kinds = [kind for kind, _ in per_unit[0]] if per_unit else []
    n_aux = sum(2 if kind == "gap" else (1 if reference is None else 0) for kind in kinds)
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

    def weights_of(u: int) -> npt.NDArray[np.intp]:
        return np.arange(offsets[u], offsets[u + 1], dtype=np.intp)

    aux = n_weights
    for j, kind in enumerate(kinds):
        if kind == "gap":
            lo, hi = aux, aux + 1
            aux += 2
            for u in range(len(units)):
                q = per_unit[u][j][1]
                add_row(np.append(weights_of(u), hi), np.append(q, -1.0), 0.0)  # q_u <= hi
                add_row(np.append(weights_of(u), lo), np.append(-q, 1.0), 0.0)  # lo <= q_u
            add_row(np.array([hi, lo]), np.array([1.0, -1.0]), tolerance)
            continue
        # Favourable rate r_u = q_u (action) or 1 - q_u (no action); sum_k w_uk = 1.
        fav = [
            q if settings.favourable == "action" else 1.0 - q for q in (p[j][1] for p in per_unit)
        ]
        if reference is not None:
            for u in range(len(units)):
                if u != reference:  # 0.8 r_c - r_u <= 0
                    cols = np.concatenate([weights_of(reference), weights_of(u)])
                    add_row(cols, np.concatenate([FOUR_FIFTHS * fav[reference], -fav[u]]), 0.0)
            continue
        top = aux
        aux += 1
        for u in range(len(units)):
            add_row(np.append(weights_of(u), top), np.append(fav[u], -1.0), 0.0)  # r_u <= M
            add_row(np.append(weights_of(u), top), np.append(-fav[u], FOUR_FIFTHS), 0.0)
    if capacity is not None:
        actions = np.concatenate([(u.governed_tp + u.governed_fp) / n_total for u in units])
        add_row(np.arange(n_weights, dtype=np.intp), actions.astype(np.float64), capacity)

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
        under = "" if capacity is None else f" under capacity {capacity:g}"
        raise DeriveError(
            f"criterion {criterion.value!r} cannot be met at tolerance {tolerance:g}{under}",
            field="tolerance" if capacity is None else "capacity",
        )
    if result.status != 0:
        raise DeriveError(f"the linear program failed: {result.message}", field="criterion")
    x = np.clip(result.x[:n_weights], 0.0, None)
    weights: list[FloatArray] = []
    points: list[LpPoint] = []
    for u, unit in enumerate(units):
        w = x[offsets[u] : offsets[u + 1]]
        w = w / w.sum()
        weights.append(w)
        points.append(LpPoint(float(w @ unit.hull.fpr), float(w @ unit.hull.tpr)))
    return LpSolution(weights, points, float(result.fun + constant))
