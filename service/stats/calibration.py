"""Calibration of a probability score within one group, from sums an SQL query can give.

Spiegelhalter's test (Spiegelhalter 1986, Statistics in Medicine 5:421-433). For cases with an
observed outcome ``y_i`` in {0, 1} and a predicted probability ``p_i``, under the hypothesis
that every ``y_i`` is Bernoulli(``p_i``) and the cases are independent,

    Z = sum (y_i - p_i)(1 - 2 p_i) / sqrt( sum (1 - 2 p_i)^2 p_i (1 - p_i) )

is approximately standard normal; the p-value is two-sided. Expanding the polynomials gives Z
exactly from seven sums (:class:`PowerSums`), so the audit never needs the rows:

    numerator = sum y - sum p - 2 sum y p + 2 sum p^2
    variance  = sum p - 5 sum p^2 + 8 sum p^3 - 4 sum p^4

The variance is zero exactly when every score is 0, 1/2 or 1; the test then has no
distribution and is refused.

The weight (1 - 2p) changes sign at 1/2, so Z is blind to a shift of every score by the same
amount when the scores straddle 1/2 (the contributions above and below cancel).
:func:`observed_expected_test` covers that case from the same sums: under the same hypothesis
``sum y`` has mean ``sum p`` and variance ``sum p (1 - p)`` (a sum of independent Bernoulli
variables), so

    Z_oe = (sum y - sum p) / sqrt(sum p - sum p^2)

is approximately standard normal (calibration in the large; the normal approximation to the
Poisson-binomial distribution of the number of positives).

The reliability table bins the scores and sets each bin's mean score beside its observed
outcome rate with the Wilson 95% interval (Wilson 1927, JASA 22:209-212).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import pairwise

import numpy as np
from numpy.typing import ArrayLike

from service.stats.distributions import norm_sf
from service.stats.proportions import wilson_interval

_REL_ZERO = 1e-12
"""A variance below this share of the size of its terms is rounding residue, taken as zero."""


@dataclass(frozen=True, slots=True)
class PowerSums:
    """Sums over the cases with an observed outcome: ``n`` cases, sum of ``y``, of ``p`` to
    the powers 1..4 and of ``y p``. Sums of disjoint sets of cases add."""

    n: int = 0
    sum_y: float = 0.0
    sum_p: float = 0.0
    sum_p2: float = 0.0
    sum_p3: float = 0.0
    sum_p4: float = 0.0
    sum_yp: float = 0.0

    def __post_init__(self) -> None:
        values = (self.sum_y, self.sum_p, self.sum_p2, self.sum_p3, self.sum_p4, self.sum_yp)
        if self.n < 0 or not all(math.isfinite(v) for v in values):
            raise ValueError(f"power sums need n >= 0 and finite sums, got {self}")
        slack = 1e-9 * max(1, self.n)
        if not (-slack <= self.sum_y <= self.n + slack and -slack <= self.sum_p <= self.n + slack):
            raise ValueError(f"power sums need 0 <= sum_y, sum_p <= n, got {self}")

    @classmethod
    def from_rows(cls, p: ArrayLike, y: ArrayLike) -> PowerSums:
        """The sums of the given rows (scores in [0, 1], outcomes 0 or 1)."""
        pa = np.asarray(p, dtype=float).ravel()
        ya = np.asarray(y, dtype=float).ravel()
        if pa.shape != ya.shape:
            raise ValueError(f"p and y differ in length: {pa.size} and {ya.size}")
        if not np.all((pa >= 0.0) & (pa <= 1.0)):
            raise ValueError("every score p must lie in [0, 1]")
        if not np.all((ya == 0.0) | (ya == 1.0)):
            raise ValueError("every outcome y must be 0 or 1")
        p2 = pa * pa
        return cls(
            n=int(pa.size),
            sum_y=math.fsum(ya),
            sum_p=math.fsum(pa),
            sum_p2=math.fsum(p2),
            sum_p3=math.fsum(p2 * pa),
            sum_p4=math.fsum(p2 * p2),
            sum_yp=math.fsum(ya * pa),
        )

    def __add__(self, other: PowerSums) -> PowerSums:
        if not isinstance(other, PowerSums):
            return NotImplemented
        return PowerSums(
            n=self.n + other.n,
            sum_y=self.sum_y + other.sum_y,
            sum_p=self.sum_p + other.sum_p,
            sum_p2=self.sum_p2 + other.sum_p2,
            sum_p3=self.sum_p3 + other.sum_p3,
            sum_p4=self.sum_p4 + other.sum_p4,
            sum_yp=self.sum_yp + other.sum_yp,
        )


@dataclass(frozen=True, slots=True)
class CalibrationTest:
    """Spiegelhalter's Z, its two-sided normal p-value, and the observed number of positives
    (``sum y``) beside the number the scores expect (``sum p``)."""

    statistic: float
    p_value: float
    observed: float
    expected: float


def spiegelhalter_test(sums: PowerSums) -> CalibrationTest:
    """Spiegelhalter's calibration test from power sums (formula in the module docstring).

    Raises ValueError when there are no cases or the variance is zero (every score 0, 1/2 or
    1), where the statistic is undefined.
    """
    if sums.n == 0:
        raise ValueError("Spiegelhalter's test needs at least one case with an observed outcome")
    numerator = sums.sum_y - sums.sum_p - 2.0 * sums.sum_yp + 2.0 * sums.sum_p2
    variance = sums.sum_p - 5.0 * sums.sum_p2 + 8.0 * sums.sum_p3 - 4.0 * sums.sum_p4
    scale = sums.sum_p + 5.0 * sums.sum_p2 + 8.0 * sums.sum_p3 + 4.0 * sums.sum_p4
    if variance <= _REL_ZERO * scale:
        raise ValueError(
            "Spiegelhalter's test is undefined here: its variance sum (1-2p)^2 p (1-p) is zero "
            f"(every score is 0, 1/2 or 1) over these {sums.n} cases"
        )
    z = numerator / math.sqrt(variance)
    p_value = float(2.0 * norm_sf(abs(z)))
    return CalibrationTest(z, p_value, sums.sum_y, sums.sum_p)


def observed_expected_test(sums: PowerSums) -> CalibrationTest:
    """Observed against expected number of positives (formula in the module docstring).

    Raises ValueError when there are no cases or every score is 0 or 1 (zero variance).
    """
    if sums.n == 0:
        raise ValueError("the observed-expected test needs at least one case with an outcome")
    variance = sums.sum_p - sums.sum_p2
    if variance <= _REL_ZERO * (sums.sum_p + sums.sum_p2):
        raise ValueError(
            "the observed-expected test is undefined here: its variance sum p (1-p) is zero "
            f"(every score is 0 or 1) over these {sums.n} cases"
        )
    z = (sums.sum_y - sums.sum_p) / math.sqrt(variance)
    return CalibrationTest(z, float(2.0 * norm_sf(abs(z))), sums.sum_y, sums.sum_p)


@dataclass(frozen=True, slots=True)
class ReliabilityBin:
    """One score bin ``[low, high)``: its ``n`` cases with an observed outcome, ``positives``
    among them, the mean score, and the observed rate with its Wilson 95% interval (all None
    for an empty bin)."""

    low: float
    high: float
    n: int
    positives: int
    mean_score: float | None
    observed: float | None
    observed_low: float | None
    observed_high: float | None


def reliability_table(
    edges: Sequence[float],
    counts: Sequence[int],
    positives: Sequence[int],
    score_sums: Sequence[float],
) -> list[ReliabilityBin]:
    """One :class:`ReliabilityBin` per pair of consecutive ``edges``.

    ``edges`` are all the bin edges, increasing, the first and last being the ends of the score
    range; ``counts``, ``positives`` and ``score_sums`` have one entry per bin (cases with an
    observed outcome, those with outcome 1, and the sum of their scores).
    """
    bins = len(edges) - 1
    if bins < 1:
        raise ValueError("a reliability table needs at least two edges")
    if not all(math.isfinite(e) for e in edges) or any(b <= a for a, b in pairwise(edges)):
        raise ValueError(f"edges must be finite and strictly increasing, got {list(edges)}")
    if not len(counts) == len(positives) == len(score_sums) == bins:
        raise ValueError(
            f"{bins} bins need {bins} counts, positives and score sums; got "
            f"{len(counts)}, {len(positives)} and {len(score_sums)}"
        )
    table: list[ReliabilityBin] = []
    for i in range(bins):
        low, high = float(edges[i]), float(edges[i + 1])
        n, k, s = int(counts[i]), int(positives[i]), float(score_sums[i])
        if not 0 <= k <= n:
            raise ValueError(f"bin {i}: need 0 <= positives <= count, got {k} of {n}")
        if n == 0:
            if s != 0.0:
                raise ValueError(f"bin {i}: an empty bin has score sum {s}, not 0")
            table.append(ReliabilityBin(low, high, 0, 0, None, None, None, None))
            continue
        mean = s / n
        slack = 1e-9 * (high - low + abs(low) + abs(high))
        if not low - slack <= mean <= high + slack:
            raise ValueError(f"bin {i}: mean score {mean} lies outside the bin [{low}, {high}]")
        lo, hi = wilson_interval(k, n)
        table.append(ReliabilityBin(low, high, n, k, mean, k / n, lo, hi))
    return table
