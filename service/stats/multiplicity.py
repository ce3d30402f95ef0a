"""Adjusted p-values for the family of checks in one audit.

- Holm 1979 (Scandinavian Journal of Statistics 6:65-70), step-down: with p(1) <= ... <= p(m),
  adj(i) = max over j <= i of min(1, (m - j + 1) p(j)). Controls the family-wise error rate
  under any dependence.
- Benjamini & Yekutieli 2001 (Annals of Statistics 29:1165-1188), step-up with
  c(m) = sum_{i=1..m} 1/i: adj(i) = min over j >= i of min(1, c(m) m p(j) / j). Controls the
  false discovery rate under any dependence.

Adjusted values are returned in the order of the input; tied p-values get equal adjusted
values whatever order the sort leaves them in.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Literal

Method = Literal["holm", "benjamini-yekutieli"]


def adjust_p_values(p_values: Sequence[float], method: Method) -> list[float]:
    """Adjusted p-values by ``method``, in the input order; [] for no p-values."""
    values = [float(p) for p in p_values]
    for i, p in enumerate(values):
        if math.isnan(p) or not 0.0 <= p <= 1.0:
            raise ValueError(f"p-value {i} must lie in [0, 1], got {p}")
    m = len(values)
    order = sorted(range(m), key=values.__getitem__)
    adjusted = [0.0] * m
    if method == "holm":
        running = 0.0
        for rank, index in enumerate(order):  # rank j - 1
            running = max(running, min(1.0, (m - rank) * values[index]))
            adjusted[index] = running
    elif method == "benjamini-yekutieli":
        c_m = math.fsum(1.0 / i for i in range(1, m + 1))
        running = 1.0
        for rank in range(m - 1, -1, -1):
            index = order[rank]
            running = min(running, c_m * m * values[index] / (rank + 1))
            adjusted[index] = running
    else:
        raise ValueError(f'method must be "holm" or "benjamini-yekutieli", got {method!r}')
    return adjusted
