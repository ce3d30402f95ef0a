"""A pooled difference of two proportions across strata (e.g. months of a window).

Mantel-Haenszel risk difference with the Mantel & Haenszel (1959, JNCI 22:719-748) stratum
weights ``w_h = n1_h n2_h / N_h`` (``N_h = n1_h + n2_h``):

    d_MH = sum_h w_h (k1_h / n1_h - k2_h / n2_h) / sum_h w_h

and the variance estimator of Sato (1989, Biometrics 45:1323-1324), which stays consistent
both with a few large strata and with many sparse ones:

    Var(d_MH) = (d_MH sum_h P_h + sum_h Q_h) / (sum_h w_h)^2
    P_h = (n1_h^2 k2_h - n2_h^2 k1_h + n1_h n2_h (n2_h - n1_h) / 2) / N_h^2
    Q_h = (k1_h (n2_h - k2_h) + k2_h (n1_h - k1_h)) / (2 N_h)

(as printed in the SAS/STAT PROC FREQ documentation, "Common Risk Difference"; the paper
itself not seen). With one stratum this is ``p1 q1 / n1 + p2 q2 / n2``. The interval is the
Wald interval ``d_MH +- z SE``, clipped to [-1, 1].

Counts may be expected counts (sums of probabilities under a randomized rule), hence floats.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.stats.proportions import Z95


@dataclass(frozen=True)
class PooledDifference:
    """Pooled ``p1 - p2`` with its Wald interval; ``strata`` counts the informative strata
    (both groups non-empty)."""

    estimate: float
    low: float
    high: float
    standard_error: float
    strata: int


def mantel_haenszel_difference(
    strata: Sequence[tuple[float, float, float, float]], z: float = Z95
) -> PooledDifference:
    """Mantel-Haenszel risk difference of strata ``(k1, n1, k2, n2)`` with Sato's variance.

    A stratum with an empty group has weight 0 and adds nothing to either sum.
    """
    table = np.asarray(strata, dtype=np.float64).reshape(-1, 4)
    if table.shape[0] == 0:
        raise ValueError("need at least one stratum")
    k1, n1, k2, n2 = table.T
    if not np.all(np.isfinite(table)):
        raise ValueError("counts must be finite")
    if np.any((k1 < 0) | (k2 < 0) | (k1 > n1) | (k2 > n2)):
        raise ValueError("need 0 <= k <= n in every stratum")
    informative = (n1 > 0) & (n2 > 0)
    if not informative.any():
        raise ValueError("no stratum has both groups non-empty")
    k1, n1, k2, n2 = k1[informative], n1[informative], k2[informative], n2[informative]
    total = n1 + n2
    weight = n1 * n2 / total
    estimate = float(np.sum((k1 * n2 - k2 * n1) / total) / weight.sum())
    p_terms = (n1 * n1 * k2 - n2 * n2 * k1 + n1 * n2 * (n2 - n1) / 2.0) / (total * total)
    q_terms = (k1 * (n2 - k2) + k2 * (n1 - k1)) / (2.0 * total)
    variance = (estimate * p_terms.sum() + q_terms.sum()) / weight.sum() ** 2
    standard_error = math.sqrt(max(float(variance), 0.0))  # rounding can leave -1e-18
    return PooledDifference(
        estimate=estimate,
        low=max(-1.0, estimate - z * standard_error),
        high=min(1.0, estimate + z * standard_error),
        standard_error=standard_error,
        strata=int(informative.sum()),
    )
