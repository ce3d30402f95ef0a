"""An independent, deliberately plain LP over ALL empirical ROC points of every group.

Written for the tests (and the benchmark's side-by-side run) without any code of
``service.policy.derive``: the ROC points come from scikit-learn's ``roc_curve`` with
``drop_intermediate=False`` (every distinct threshold), the constraints are written pair by
pair, and scipy's HiGHS solves it. Randomizing between cuts reaches the convex hull of the ROC
points (Hardt, Price & Srebro 2016, "Equality of Opportunity in Supervised Learning",
NeurIPS, section 4), so the optimum over all points equals the optimum over hull vertices.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.optimize import linprog
from sklearn.metrics import roc_curve


def all_points(scores: np.ndarray, outcomes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(fpr, tpr) at every distinct threshold, including never (0, 0) and always (1, 1)."""
    fpr, tpr, _ = roc_curve(outcomes, scores, drop_intermediate=False)
    return fpr, tpr


def reference_cost(
    scores: np.ndarray,
    outcomes: np.ndarray,
    groups: np.ndarray,
    criterion: str,
    tolerance: float,
    cost_fp: float,
    cost_fn: float,
    favourable: str = "action",
    capacity: float | None = None,
    reference: object | None = None,
) -> float:
    """Minimal expected cost per case under ``criterion`` (pairwise constraints).

    Four-fifths: every group's favourable rate >= 0.8 x every other group's (so >= 0.8 x the
    highest), or >= 0.8 x the ``reference`` group's when one is named; no slack. Capacity:
    the overall action rate, sum over groups of (n_g / N) x action rate_g, at most
    ``capacity``.
    """
    if criterion == "single-cut":
        groups = np.zeros(len(scores), dtype=int)
        criterion = "max-utility"
    labels = sorted(set(groups.tolist()))
    n_total = len(scores)
    blocks = []
    for g in labels:
        rows = groups == g
        fpr, tpr = all_points(scores[rows], outcomes[rows])
        n = int(rows.sum())
        pos = int(outcomes[rows].sum())
        blocks.append((fpr, tpr, n, pos, n - pos))
    sizes = [len(b[0]) for b in blocks]
    start = np.concatenate([[0], np.cumsum(sizes)])
    n_vars = int(start[-1])

    c = np.zeros(n_vars)
    constant = 0.0
    for i, (fpr, tpr, _n, pos, neg) in enumerate(blocks):
        # cost = (c_FP * neg * FPR + c_FN * pos * (1 - TPR)) / N
        c[start[i] : start[i + 1]] = (cost_fp * neg * fpr - cost_fn * pos * tpr) / n_total
        constant += cost_fn * pos / n_total

    def rate_row(i: int, kind: str) -> sparse.csr_matrix:
        fpr, tpr, n, pos, neg = blocks[i]
        if kind == "tpr":
            values = tpr
        elif kind == "fpr":
            values = fpr
        else:  # action rate
            values = (pos * tpr + neg * fpr) / n
        cols = np.arange(start[i], start[i + 1])
        return sparse.csr_matrix((values, (np.zeros(len(cols), int), cols)), shape=(1, n_vars))

    a_ub: list[sparse.csr_matrix] = []
    b_ub: list[float] = []
    kinds = {
        "max-utility": [],
        "demographic-parity": ["action"],
        "equal-opportunity": ["tpr"],
        "predictive-equality": ["fpr"],
        "equalized-odds": ["tpr", "fpr"],
    }
    if criterion == "four-fifths":
        comparators = range(len(blocks)) if reference is None else [labels.index(reference)]
        for i in range(len(blocks)):
            for j in comparators:
                if i == j:
                    continue
                ri, rj = rate_row(i, "action"), rate_row(j, "action")
                if favourable == "action":
                    # r_i >= 0.8 r_j  <=>  0.8 r_j - r_i <= 0
                    a_ub.append(0.8 * rj - ri)
                    b_ub.append(0.0)
                else:
                    # (1 - q_i) >= 0.8 (1 - q_j)  <=>  q_i - 0.8 q_j <= 0.2
                    a_ub.append(ri - 0.8 * rj)
                    b_ub.append(0.2)
    else:
        for kind in kinds[criterion]:
            for i in range(len(blocks)):
                for j in range(len(blocks)):
                    if i != j:
                        a_ub.append(rate_row(i, kind) - rate_row(j, kind))
                        b_ub.append(tolerance)
    if capacity is not None:
        overall = sum(rate_row(i, "action") * (blocks[i][2] / n_total) for i in range(len(blocks)))
        a_ub.append(sparse.csr_matrix(overall))
        b_ub.append(capacity)
    a_eq = sparse.csr_matrix(
        (np.ones(n_vars), (np.repeat(np.arange(len(blocks)), sizes), np.arange(n_vars))),
        shape=(len(blocks), n_vars),
    )
    res = linprog(
        c,
        A_ub=sparse.vstack(a_ub).tocsr() if a_ub else None,
        b_ub=np.array(b_ub) if b_ub else None,
        A_eq=a_eq,
        b_eq=np.ones(len(blocks)),
        bounds=(0, None),
        method="highs",
    )
    assert res.status == 0, res.message
    return float(res.fun + constant)
