"""A linear trend across periods in estimates whose variances are known.

Weighted least squares of ``estimate`` on ``time`` with weights ``w_i = 1 / variance_i``,
the variances taken as known (no residual scale is estimated), so the slope's variance is
``1 / sum_i w_i (t_i - tbar)^2`` with ``tbar = sum_i w_i t_i / sum_i w_i``:

    slope = sum_i w_i (t_i - tbar) (y_i - ybar) / sum_i w_i (t_i - tbar)^2

and the test of slope = 0 is the two-sided z test ``2 (1 - Phi(|slope / SE|))`` (the
fixed-effect meta-regression of, e.g., Hedges & Olkin 1985, Statistical Methods for
Meta-Analysis).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.stats.distributions import norm_sf


@dataclass(frozen=True)
class Trend:
    """Slope per unit of time, its standard error, ``z = slope / SE``, two-sided p-value."""

    slope: float
    standard_error: float
    statistic: float
    p_value: float
    points: int


def weighted_trend(
    times: Sequence[float], estimates: Sequence[float], variances: Sequence[float]
) -> Trend:
    """Inverse-variance weighted slope of ``estimates`` on ``times`` with a z test."""
    t = np.asarray(times, dtype=np.float64)
    y = np.asarray(estimates, dtype=np.float64)
    v = np.asarray(variances, dtype=np.float64)
    if not t.ndim == y.ndim == v.ndim == 1 or not t.size == y.size == v.size:
        raise ValueError("times, estimates and variances must be 1-D and of one length")
    if t.size < 3:
        raise ValueError(f"a trend needs at least 3 points, got {t.size}")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(y)) and np.all(np.isfinite(v))):
        raise ValueError("times, estimates and variances must be finite")
    if np.any(v <= 0.0):
        raise ValueError("variances must be positive")
    w = 1.0 / v
    centred = t - np.sum(w * t) / w.sum()
    spread = float(np.sum(w * centred * centred))
    if spread <= 0.0 or np.ptp(t) == 0.0:
        raise ValueError("times must not all be equal")
    slope = float(np.sum(w * centred * y)) / spread
    standard_error = 1.0 / math.sqrt(spread)
    statistic = slope / standard_error
    return Trend(
        slope=slope,
        standard_error=standard_error,
        statistic=statistic,
        p_value=float(2.0 * norm_sf(abs(statistic))),
        points=int(t.size),
    )
