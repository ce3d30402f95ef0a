"""Design effect of an estimated proportion whose variance exceeds the binomial one.

Rao & Scott 1992 ("A simple method for the analysis of clustered binary data", Biometrics
48:577-585): a proportion p_hat of n cases whose variance v is larger than the binomial
p (1 - p) / n is treated as a binomial proportion of the *effective sample size*
n / d, with d = v / (p (1 - p) / n) its design effect; the count becomes k / d, so the
proportion is unchanged. Any test built for binomial samples then carries the extra variance.

Here d is never below 1: a measured variance below the binomial one (sampling noise of the
variance estimate) does not make the sample count more than its cases.
"""

from __future__ import annotations

import math


def design_effect(rate: float, n: float, standard_error: float) -> float:
    """max(1, se^2 / (p (1 - p) / n)); 1 where the binomial variance is 0 (p = 0 or 1) or the
    standard error is not a finite number >= 0."""
    if not (n > 0 and 0.0 <= rate <= 1.0):
        raise ValueError(f"need n > 0 and 0 <= rate <= 1, got {rate} of {n}")
    binomial = rate * (1.0 - rate) / n
    if binomial <= 0.0 or not math.isfinite(standard_error) or standard_error < 0.0:
        return 1.0
    return max(1.0, standard_error * standard_error / binomial)


def effective_counts(
    k: float, n: float, standard_error: float | None
) -> tuple[float, float, float]:
    """(k / d, n / d, d): the count and sample size a binomial test should use for the
    proportion k / n with standard error ``standard_error`` (d = 1 without one)."""
    if standard_error is None:
        return k, n, 1.0
    d = design_effect(k / n, n, standard_error)
    return k / d, n / d, d
