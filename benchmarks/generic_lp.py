"""The generic all-points LP in its strongest simple formulation, for the benchmark's anchor.

Same LP as ``tests/policy/reference_lp.py`` (one weight per empirical ROC point of each group,
from scikit-learn's ``roc_curve`` with every threshold; HiGHS through scipy), but the parity
constraints are written with one shared variable per constrained rate instead of one row per
ordered pair of groups:

- a gap criterion (every pairwise gap of rate q at most eps) holds exactly when some centre r
  has |q_g - r| <= eps / 2 for every group g (take r halfway between the largest and the
  smallest q_g), so each rate adds one free variable r and two rows per group, each row
  holding one group's block of weights, instead of G (G - 1) rows of two blocks each;
- four-fifths (every favourable rate >= 0.8 x the highest) adds one variable M with
  q_g <= M and 0.8 M - q_g <= 0 per group (or 0.8 q_ref - q_g <= 0 with a reference group).

This is what a careful user of a generic LP solver would write; the pairwise form is what the
tests keep as their deliberately plain, independent reference. Both give the same optimum.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.optimize import linprog
from sklearn.metrics import roc_curve

RATES = {
    "max-utility": [],
    "demographic-parity": ["action"],
    "equal-opportunity": ["tpr"],
    "predictive-equality": ["fpr"],
    "equalized-odds": ["tpr", "fpr"],
}


def shared_rate_cost(
    scores: np.ndarray,
    outcomes: np.ndarray,
    groups: np.ndarray,
    criterion: str,
    tolerance: float,
    cost_fp: float,
    cost_fn: float,
) -> float:
    """Minimal expected cost per case under ``criterion`` (favourable = action, no capacity)."""
    if criterion == "single-cut":
        groups = np.zeros(len(scores), dtype=int)
        criterion = "max-utility"
    labels = sorted(set(groups.tolist()))
    n_total = len(scores)
    blocks = []
    for g in labels:
        rows = groups == g
        fpr, tpr, _ = roc_curve(outcomes[rows], scores[rows], drop_intermediate=False)
        n = int(rows.sum())
        pos = int(outcomes[rows].sum())
        blocks.append((fpr, tpr, n, pos, n - pos))
    sizes = [len(b[0]) for b in blocks]
    start = np.concatenate([[0], np.cumsum(sizes)])
    n_weights = int(start[-1])
    kinds = ["action"] if criterion == "four-fifths" else RATES[criterion]
    n_vars = n_weights + len(kinds)  # one shared variable per constrained rate

    c = np.zeros(n_vars)
    constant = 0.0
    for i, (fpr, tpr, _n, pos, neg) in enumerate(blocks):
        c[start[i] : start[i + 1]] = (cost_fp * neg * fpr - cost_fn * pos * tpr) / n_total
        constant += cost_fn * pos / n_total

    def rate(i: int, kind: str) -> np.ndarray:
        fpr, tpr, n, pos, neg = blocks[i]
        if kind == "tpr":
            return tpr
        if kind == "fpr":
            return fpr
        return (pos * tpr + neg * fpr) / n

    rows_i: list[np.ndarray] = []
    cols_i: list[np.ndarray] = []
    vals_i: list[np.ndarray] = []
    b_ub: list[float] = []

    def add_row(i: int, kind: str, sign: float, shared: int, shared_coef: float, b: float) -> None:
        row = len(b_ub)
        cols = np.arange(start[i], start[i + 1])
        rows_i.append(np.full(len(cols) + 1, row))
        cols_i.append(np.append(cols, shared))
        vals_i.append(np.append(sign * rate(i, kind), shared_coef))
        b_ub.append(b)

    for k, kind in enumerate(kinds):
        shared = n_weights + k
        for i in range(len(blocks)):
            if criterion == "four-fifths":
                add_row(i, kind, 1.0, shared, -1.0, 0.0)  # q_i - M <= 0
                add_row(i, kind, -1.0, shared, 0.8, 0.0)  # 0.8 M - q_i <= 0
            else:
                add_row(i, kind, 1.0, shared, -1.0, tolerance / 2)  # q_i - r <= eps / 2
                add_row(i, kind, -1.0, shared, 1.0, tolerance / 2)  # r - q_i <= eps / 2
    a_ub = None
    if b_ub:
        a_ub = sparse.csr_matrix(
            (np.concatenate(vals_i), (np.concatenate(rows_i), np.concatenate(cols_i))),
            shape=(len(b_ub), n_vars),
        )
    a_eq = sparse.csr_matrix(
        (np.ones(n_weights), (np.repeat(np.arange(len(blocks)), sizes), np.arange(n_weights))),
        shape=(len(blocks), n_vars),
    )
    bounds = [(0.0, None)] * n_weights + [(None, None)] * len(kinds)
    res = linprog(
        c,
        A_ub=a_ub,
        b_ub=np.array(b_ub) if b_ub else None,
        A_eq=a_eq,
        b_eq=np.ones(len(blocks)),
        bounds=bounds,
        method="highs",
    )
    if res.status != 0:
        raise RuntimeError(res.message)
    return float(res.fun + constant)
