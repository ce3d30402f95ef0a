"""Score tests for the difference of two independent proportions, d = p1 - p2.

The one-sided test of H0: d <= value (alternative "larger") or H0: d >= value ("smaller") is
the score test of Miettinen & Nurminen 1985 ("Comparative analysis of two rates", Statistics
in Medicine 4:213-226):

    z = (p1_hat - p2_hat - value) / sqrt(V),
    V = (p1~ (1 - p1~) / n1 + p2~ (1 - p2~) / n2) * N / (N - 1),   N = n1 + n2,

where p1~, p2~ = p1~ - value are the maximum-likelihood estimates restricted to d = value,
computed with the closed-form root of the likelihood cubic given by Farrington & Manning 1990
(Statistics in Medicine 9:1447-1454), and N / (N - 1) is Miettinen & Nurminen's variance
correction. p-values use the standard normal distribution.

Counts may be non-integer (expected counts of a randomized rule: sums of action
probabilities); the formulas only use them through the rates and the sample sizes.
"""

from __future__ import annotations

import math

from scipy.special import ndtr

from service.stats.margins import Alternative, MarginEvidence, OneSidedTest, Side

__all__ = ["OneSidedTest", "difference_evidence", "score_test_difference"]


def score_test_difference(
    k1: float, n1: float, k2: float, n2: float, value: float, alternative: Alternative
) -> OneSidedTest:
    """Miettinen-Nurminen score test of H0: p1 - p2 <= value ("larger") or >= value
    ("smaller").

    Requires 0 <= k <= n, n > 0, n1 + n2 > 1 (for N / (N - 1)) and -1 < value < 1.
    When the restricted variance is zero (only possible for ``value == 0`` with no successes
    or no failures at all, where the observed difference is exactly 0) the data carry no
    evidence against the null: statistic 0 and p-value 1.
    """
    _check_counts(k1, n1, k2, n2)
    if not -1.0 < value < 1.0:
        raise ValueError(f"need -1 < value < 1 for a difference of proportions, got {value}")
    if alternative not in ("larger", "smaller"):
        raise ValueError(f'alternative must be "larger" or "smaller", got {alternative!r}')
    p1_hat = k1 / n1
    p2_hat = k2 / n2
    p1_null, p2_null = _restricted_mle(p1_hat, n1, p2_hat, n2, value)
    total = n1 + n2
    variance = (p1_null * (1.0 - p1_null) / n1 + p2_null * (1.0 - p2_null) / n2) * (
        total / (total - 1.0)
    )
    if variance <= 0.0:
        return OneSidedTest(statistic=0.0, p_value=1.0)
    statistic = (p1_hat - p2_hat - value) / math.sqrt(variance)
    p_value = float(ndtr(-statistic) if alternative == "larger" else ndtr(statistic))
    return OneSidedTest(statistic=statistic, p_value=p_value)


def difference_evidence(
    k1: float, n1: float, k2: float, n2: float, margin: float
) -> MarginEvidence:
    """Evidence that p1 - p2 lies inside, or outside, the band [-margin, +margin].

    - ``p_inside``: TOST (Schuirmann 1987, J Pharmacokinet Biopharm 15:657-680), the larger
      of the p-values of H0: d <= -margin (vs larger) and H0: d >= +margin (vs smaller).
    - ``p_outside``: min(1, 2 * min(p of H0: d <= +margin vs larger, p of H0: d >= -margin
      vs smaller)); the factor 2 is Bonferroni over the two directions, so the breach test
      keeps its level whatever the margin. ``side`` is the direction of the smaller of the
      two (ties -> "above").
    """
    if not 0.0 < margin < 1.0:
        raise ValueError(f"need 0 < margin < 1, got {margin}")
    inside_low = score_test_difference(k1, n1, k2, n2, -margin, "larger").p_value
    inside_high = score_test_difference(k1, n1, k2, n2, margin, "smaller").p_value
    above = score_test_difference(k1, n1, k2, n2, margin, "larger").p_value
    below = score_test_difference(k1, n1, k2, n2, -margin, "smaller").p_value
    side: Side = "above" if above <= below else "below"
    return MarginEvidence(
        p_inside=max(inside_low, inside_high),
        p_outside=min(1.0, 2.0 * min(above, below)),
        side=side,
        estimate=k1 / n1 - k2 / n2,
    )


def _check_counts(k1: float, n1: float, k2: float, n2: float) -> None:
    for name, value in (("k1", k1), ("n1", n1), ("k2", k2), ("n2", n2)):
        if not math.isfinite(value):
            raise ValueError(f"{name} must be finite, got {value}")
    if not (0.0 <= k1 <= n1 and n1 > 0.0 and 0.0 <= k2 <= n2 and n2 > 0.0):
        raise ValueError(f"need 0 <= k <= n and n > 0, got {k1} of {n1} and {k2} of {n2}")
    if n1 + n2 <= 1.0:
        raise ValueError(f"need n1 + n2 > 1 for the N / (N - 1) correction, got {n1 + n2}")


def _restricted_mle(
    p1_hat: float, n1: float, p2_hat: float, n2: float, value: float
) -> tuple[float, float]:
    """Maximum-likelihood (p1, p2) under p1 - p2 = value (Farrington & Manning 1990).

    With theta = n2 / n1, p1~ is the root in [max(0, value), min(1, 1 + value)] of
    a x^3 + b x^2 + c x + d = 0,

        a = 1 + theta
        b = -(1 + theta + p1_hat + theta p2_hat + value (theta + 2))
        c = value^2 + value (2 p1_hat + theta + 1) + p1_hat + theta p2_hat
        d = -p1_hat value (1 + value),

    given in closed form by  v = b^3 / (3a)^3 - b c / (6 a^2) + d / (2a),
    u = sign(v) sqrt(b^2 / (3a)^2 - c / (3a)),  w = (pi + arccos(v / u^3)) / 3,
    p1~ = 2 u cos(w) - b / (3a),  p2~ = p1~ - value.
    For value = 0 the restricted estimate is the pooled rate.
    """
    if value == 0.0:
        pooled = (p1_hat * n1 + p2_hat * n2) / (n1 + n2)
        return pooled, pooled
    theta = n2 / n1
    a = 1.0 + theta
    b = -(1.0 + theta + p1_hat + theta * p2_hat + value * (theta + 2.0))
    c = value * value + value * (2.0 * p1_hat + theta + 1.0) + p1_hat + theta * p2_hat
    d = -p1_hat * value * (1.0 + value)
    v = b**3 / (3.0 * a) ** 3 - b * c / (6.0 * a * a) + d / (2.0 * a)
    u = math.copysign(math.sqrt(max(0.0, b * b / (3.0 * a) ** 2 - c / (3.0 * a))), v)
    if u == 0.0:
        # Triple root of the depressed cubic t^3 + 2v = 0.
        t = -math.copysign(abs(2.0 * v) ** (1.0 / 3.0), v)
    else:
        w = (math.pi + math.acos(min(1.0, max(-1.0, v / u**3)))) / 3.0
        t = 2.0 * u * math.cos(w)
    p1_null = t - b / (3.0 * a)
    # Clip rounding residue into the feasible range of p1 given p1 - p2 = value.
    p1_null = min(min(1.0, 1.0 + value), max(max(0.0, value), p1_null))
    return p1_null, p1_null - value
