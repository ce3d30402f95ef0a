"""Confidence intervals for proportions and their differences.

- Wilson score interval for one proportion (Wilson 1927, JASA 22:209-212).
- Newcombe's hybrid score interval for p1 - p2 of independent samples, method 10 of
  Newcombe 1998 (Statistics in Medicine 17:873-890), built from the two Wilson intervals.
"""

from __future__ import annotations

import math

Z95 = 1.959963984540054
"""Two-sided 95% normal quantile, to full precision (not 1.96)."""


def wilson_interval(successes: int, trials: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval for ``successes / trials``; (0, 1) when there are no trials."""
    if successes < 0 or trials < 0 or successes > trials:
        raise ValueError(f"need 0 <= successes <= trials, got {successes} of {trials}")
    if trials == 0:
        return 0.0, 1.0
    return wilson_interval_for_rate(successes / trials, trials, z)


def wilson_interval_for_rate(rate: float, trials: float, z: float = Z95) -> tuple[float, float]:
    """Wilson interval for an observed proportion ``rate`` out of ``trials``.

    For expected rates of a randomized rule (sums of probabilities, not integer counts):
    each case's action is then Bernoulli with the population's mean rate, so the same
    formula applies.
    """
    if not 0.0 <= rate <= 1.0 or trials < 0:
        raise ValueError(f"need 0 <= rate <= 1 and trials >= 0, got {rate} of {trials}")
    if trials == 0:
        return 0.0, 1.0
    n = float(trials)
    p = rate
    z2 = z * z
    denom = 1.0 + z2 / n
    centre = (p + z2 / (2.0 * n)) / denom
    half = (z / denom) * math.sqrt(p * (1.0 - p) / n + z2 / (4.0 * n * n))
    # Clamp the rounding residue at the ends (k = 0 or k = n give exactly 0 or 1).
    return max(0.0, centre - half), min(1.0, centre + half)


def newcombe_difference_interval(
    successes1: float, trials1: float, successes2: float, trials2: float, z: float = Z95
) -> tuple[float, float]:
    """Hybrid score interval for p1 - p2 (Newcombe 1998, method 10).

    Counts may be expected counts of a randomized rule (sums of probabilities); the Wilson
    limits are then those of the observed proportion, as in :func:`wilson_interval_for_rate`.
    """
    if trials1 == 0 or trials2 == 0:
        return -1.0, 1.0
    p1 = successes1 / trials1
    p2 = successes2 / trials2
    l1, u1 = wilson_interval_for_rate(p1, trials1, z)
    l2, u2 = wilson_interval_for_rate(p2, trials2, z)
    d = p1 - p2
    lower = d - math.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2)
    upper = d + math.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
    return max(-1.0, lower), min(1.0, upper)
