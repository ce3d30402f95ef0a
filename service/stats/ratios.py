"""The ratio r = p1 / p2 of two independent proportions on the log scale (the four-fifths rule).

Katz, Baptista, Azen & Pike 1978 (Biometrics 34:469-474): ln(r_hat) is approximately normal
with standard error

    se = sqrt(1/k1 - 1/n1 + 1/k2 - 1/n2),

which gives the interval exp(ln r_hat -+ z se) and the one-sided test
z = (ln r_hat - ln value) / se of H0: r <= value ("larger") or H0: r >= value ("smaller").

Zero cells. The log method is undefined when a success count is 0 (ln 0, 1/0) and claims
certainty when both samples have no failures (se = 0, e.g. 2/2 vs 2/2). When ANY of the four
cells k1, n1 - k1, k2, n2 - k2 is exactly 0, 0.5 is added to every cell (k -> k + 0.5,
n -> n + 1) before the formulas are applied: the Haldane-Anscombe correction, common practice
for 2x2 tables with an empty cell. Otherwise the counts are used as they are. Counts may be
non-integer (expected counts of a randomized rule).

The test is not monotone in the counts far below the value: with se dominated by 1/k1, the
statistic falls as k1 rises while ln(r_hat / value) < -2 (1 + k1 S), S = 1/k2 - 1/n2 - 1/n1
(d z / d k1 has the sign of 1 + k1 S + ln(r_hat / value) / 2). There the evidence that r is
below the value is already fairly strong (z < -2 sqrt(k1 (1 + k1 S)) at the turn, so a
one-sided p below about 0.023 for k1 >= 1), but it can matter after a multiplicity
adjustment: against 10/20 at floor 0.8, 1/20 gives p = 0.019 while 0/20 and 2/20 give 0.023
and 0.025.
"""

from __future__ import annotations

import math

from scipy.special import ndtr

from service.stats.margins import Alternative, MarginEvidence, OneSidedTest
from service.stats.proportions import Z95

__all__ = [
    "OneSidedTest",
    "katz_ratio_interval",
    "log_ratio_test",
    "ratio_floor_evidence",
]


def katz_ratio_interval(
    k1: float, n1: float, k2: float, n2: float, z: float = Z95
) -> tuple[float, float]:
    """Log (Katz) interval for p1 / p2: exp(ln r_hat -+ z se), zero cells corrected.

    A tiny non-integer count can make se huge; the upper end is then ``inf``.
    """
    if not z > 0.0:
        raise ValueError(f"need z > 0, got {z}")
    log_ratio, se = _log_ratio_and_se(k1, n1, k2, n2)
    return _exp(log_ratio - z * se), _exp(log_ratio + z * se)


def log_ratio_test(
    k1: float, n1: float, k2: float, n2: float, value: float, alternative: Alternative
) -> OneSidedTest:
    """Wald test on the log scale of H0: p1 / p2 <= value ("larger") or >= value ("smaller")."""
    if not (value > 0.0 and math.isfinite(value)):
        raise ValueError(f"need a finite ratio value > 0, got {value}")
    if alternative not in ("larger", "smaller"):
        raise ValueError(f'alternative must be "larger" or "smaller", got {alternative!r}')
    log_ratio, se = _log_ratio_and_se(k1, n1, k2, n2)
    statistic = (log_ratio - math.log(value)) / se
    p_value = float(ndtr(-statistic) if alternative == "larger" else ndtr(statistic))
    return OneSidedTest(statistic=statistic, p_value=p_value)


def ratio_floor_evidence(
    k1: float, n1: float, k2: float, n2: float, floor: float
) -> MarginEvidence:
    """Evidence that p1 / p2 lies in the band [floor, inf) or below it.

    ``p_inside`` is the p-value of H0: r <= floor (vs larger); ``p_outside`` that of
    H0: r >= floor (vs smaller), one-sided with no doubling since the band has one edge.
    ``side`` is always "below". ``estimate`` is the ratio the test uses (zero cells
    corrected as described in the module docstring, so it is positive; it is ``inf`` only
    when k2 / n2 is too small for a float ratio).
    """
    test = log_ratio_test(k1, n1, k2, n2, floor, "larger")
    log_ratio, _ = _log_ratio_and_se(k1, n1, k2, n2)
    return MarginEvidence(
        p_inside=test.p_value,
        p_outside=float(ndtr(test.statistic)),
        side="below",
        estimate=_exp(log_ratio),
    )


def _log_ratio_and_se(k1: float, n1: float, k2: float, n2: float) -> tuple[float, float]:
    for name, x in (("k1", k1), ("n1", n1), ("k2", k2), ("n2", n2)):
        if not math.isfinite(x):
            raise ValueError(f"{name} must be finite, got {x}")
    if not (0.0 <= k1 <= n1 and n1 > 0.0 and 0.0 <= k2 <= n2 and n2 > 0.0):
        raise ValueError(f"need 0 <= k <= n and n > 0, got {k1} of {n1} and {k2} of {n2}")
    if min(k1, n1 - k1, k2, n2 - k2) == 0.0:
        k1, n1, k2, n2 = k1 + 0.5, n1 + 1.0, k2 + 0.5, n2 + 1.0
    log_ratio = math.log(k1) - math.log(n1) - math.log(k2) + math.log(n2)
    # 1/k - 1/n >= 0 for each sample; a count too small to invert leaves se infinite.
    variance = (_inverse(k1) - 1.0 / n1) + (_inverse(k2) - 1.0 / n2)
    return log_ratio, math.sqrt(max(0.0, variance))


def _inverse(x: float) -> float:
    return 1.0 / x if x >= 1e-300 else math.inf


def _exp(x: float) -> float:
    return math.exp(x) if x < 709.0 else math.inf
