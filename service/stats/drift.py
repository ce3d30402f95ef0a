"""Drift of the score distribution, visible before any outcome arrives.

Both functions take the scores binned the same way twice: a baseline (the calibration data, say)
and a current sample (a day's or a month's decisions), as counts per bin.

Population stability index (common practice in credit scoring; no single original source)::

    PSI = sum_j (c_j - b_j) ln(c_j / b_j)

over bins ``j``, with ``b`` and ``c`` the two count vectors normalised to shares. Each term is
non-negative, the sum is symmetric in the two samples and zero exactly when the shares agree
(it is the symmetrised Kullback-Leibler divergence ``KL(c||b) + KL(b||c)``). An empty bin would
make it infinite, so every share below ``floor`` (an empty bin's 0 included) is raised to
``floor`` before the sum, without renormalising (common practice; the floor caps what one bin
can add). Thresholds of common practice: below 0.1 stable, 0.1 to 0.25 moderate shift, above
0.25 major shift. They ignore sample size: for two samples from the same distribution,
``n * PSI`` is approximately chi-square with B - 1 degrees of freedom for a current sample of
``n`` against a large baseline (PSI ~ Pearson's X^2 / n to second order), so with 10 bins PSI
averages about 9 / n by chance alone, more with empty bins floored: small daily samples cross
the thresholds often (see the tests for figures).

Homogeneity test: Pearson's chi-square test on the 2 x B table of counts (Pearson 1900,
Philosophical Magazine 50:157-175), ``X^2 = sum (O - E)^2 / E`` with ``E = row total * column
total / grand total``, ``B' - 1`` degrees of freedom where ``B'`` is the number of bins not
empty in both samples (bins empty in both are dropped: they carry no information and their
expected counts are 0). With fewer than two such bins there is nothing to test: statistic 0,
0 degrees of freedom, p-value 1.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from service.stats.distributions import chi2_sf

PSI_MODERATE = 0.1
"""PSI above this: a moderate shift (common practice)."""
PSI_MAJOR = 0.25
"""PSI above this: a major shift (common practice)."""


def _check_counts(baseline: Sequence[float], current: Sequence[float]) -> None:
    if len(baseline) != len(current) or len(baseline) == 0:
        raise ValueError(
            f"need the same number of bins (at least one) twice, got {len(baseline)} and "
            f"{len(current)}"
        )
    for name, values in (("baseline", baseline), ("current", current)):
        if not all(math.isfinite(v) and v >= 0 for v in values):
            raise ValueError(f"{name} counts must be finite and non-negative: {list(values)}")
        if sum(values) <= 0:
            raise ValueError(f"{name} has no cases: nothing to compare")


def population_stability_index(
    baseline: Sequence[float], current: Sequence[float], floor: float = 1e-4
) -> float:
    """PSI of two binned samples (counts or shares per bin; formula in the module docstring)."""
    _check_counts(baseline, current)
    if not 0.0 < floor < 1.0:
        raise ValueError(f"floor must lie in (0, 1), got {floor}")
    total_b, total_c = math.fsum(baseline), math.fsum(current)
    terms = []
    for b_count, c_count in zip(baseline, current, strict=True):
        b = max(b_count / total_b, floor)
        c = max(c_count / total_c, floor)
        terms.append((c - b) * math.log(c / b))
    return math.fsum(terms)


@dataclass(frozen=True, slots=True)
class HomogeneityTest:
    """Pearson's X^2 on the 2 x B table, its degrees of freedom and upper-tail p-value."""

    statistic: float
    dof: int
    p_value: float


def homogeneity_test(
    baseline_counts: Sequence[float], current_counts: Sequence[float]
) -> HomogeneityTest:
    """Pearson's chi-square test that two binned samples share one distribution."""
    _check_counts(baseline_counts, current_counts)
    kept = [(b, c) for b, c in zip(baseline_counts, current_counts, strict=True) if b + c > 0]
    if len(kept) < 2:
        return HomogeneityTest(0.0, 0, 1.0)
    row_b = math.fsum(b for b, _ in kept)
    row_c = math.fsum(c for _, c in kept)
    total = row_b + row_c
    terms = []
    for b, c in kept:
        column = b + c
        for observed, row in ((b, row_b), (c, row_c)):
            expected = row * column / total
            terms.append((observed - expected) ** 2 / expected)
    statistic = math.fsum(terms)
    dof = len(kept) - 1
    return HomogeneityTest(statistic, dof, float(chi2_sf(statistic, dof)))
