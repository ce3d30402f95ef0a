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
0 degrees of freedom, p-value 1. Its chi-square p-value is asymptotic: it fails in the far tail
when expected counts are small, most of all in a bin holding few or no baseline rows (see
error-rates.md), so the daily warnings use the Monte Carlo test below instead.

Monte Carlo homogeneity test (``homogeneity_mc_test``): the same statistic, its p-value from the
exact conditional distribution of the table given both margins (the baseline's size, the
current sample's size and each bin's pooled count). If both samples come from one distribution,
then given the margins the current sample's bin counts are multivariate hypergeometric: a draw
of ``n_current`` rows without replacement from the pooled table. This conditioning accounts for
the baseline's own sampling noise (the baseline is a sample too, not the truth), and a bin
holding one pooled row can hold at most one current row, whatever its expected count. The
p-value is a Monte Carlo p-value (Hope 1968, "A simplified Monte Carlo significance test
procedure", JRSS B 30:582-598): the observed table is exchangeable with tables drawn from the
null distribution, so counting the draws whose statistic is at least the observed one gives an
exact-level test whatever the number of draws. Draws stop early, sequentially (Besag and
Clifford 1991, "Sequential Monte Carlo p-values", Biometrika 78:301-304): sample until
``stop_after`` = h draws reach the observed statistic, or ``max_draws`` draws are made. Stopped
after ``l`` draws with h exceedances the p-value is ``h / l``; at ``max_draws`` with ``g < h``
exceedances it is ``(g + 1) / (max_draws + 1)``. Both are valid (P(p <= a) <= a for every
a), so most null samples stop after a few dozen draws while a real shift costs ``max_draws``
draws, whose smallest p-value ``1 / (max_draws + 1)`` the caller sets below the level it needs.
Ties count as exceedances (the statistic takes few values in small tables). The draws come from
a generator seeded by the caller: the same inputs and seed give the same p-value.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

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


@dataclass(frozen=True, slots=True)
class MonteCarloHomogeneity:
    """Pearson's X^2 on the 2 x B table and its sequential Monte Carlo p-value."""

    statistic: float
    p_value: float
    draws: int
    exceedances: int


def _pearson_rows(
    current: npt.NDArray[np.int64],
    pooled: npt.NDArray[np.float64],
    n_current: float,
    n_baseline: float,
) -> npt.NDArray[np.float64]:
    """X^2 of each 2 x B table whose current row is a row of ``current`` (margins fixed):
    with column totals t_j and E_j = n_current t_j / N, the two cells of a column deviate by
    the same amount, so X^2 = N^2 / (n_current n_baseline) * sum_j (x_j - E_j)^2 / t_j."""
    total = n_current + n_baseline
    expected = n_current * pooled / total
    scale = total * total / (n_current * n_baseline)
    out: npt.NDArray[np.float64] = scale * (((current - expected) ** 2) / pooled).sum(axis=1)
    return out


def homogeneity_mc_test(
    baseline_counts: Sequence[int],
    current_counts: Sequence[int],
    *,
    max_draws: int,
    seed: int | Sequence[int],
    stop_after: int = 10,
) -> MonteCarloHomogeneity:
    """Pearson's X^2 of two binned samples with its exact conditional Monte Carlo p-value
    (conditioning, draws and stopping rule in the module docstring)."""
    _check_counts(baseline_counts, current_counts)
    if not all(float(v).is_integer() for v in (*baseline_counts, *current_counts)):
        raise ValueError("the Monte Carlo test needs whole counts")
    if max_draws < 1 or stop_after < 1:
        raise ValueError(f"need max_draws and stop_after >= 1, got {max_draws}, {stop_after}")
    base = np.asarray(baseline_counts, dtype=np.int64)
    cur = np.asarray(current_counts, dtype=np.int64)
    keep = (base + cur) > 0
    if int(keep.sum()) < 2:
        return MonteCarloHomogeneity(0.0, 1.0, 0, 0)
    base, cur = base[keep], cur[keep]
    pooled = base + cur
    n_cur, n_base = int(cur.sum()), int(base.sum())
    pooled_f = pooled.astype(np.float64)
    observed = float(_pearson_rows(cur[None, :], pooled_f, n_cur, n_base)[0])
    # Tables whose statistic equals the observed one up to rounding count as exceedances.
    bar = observed - 1e-9 * max(1.0, abs(observed))
    rng = np.random.default_rng(seed)
    drawn = exceed = 0
    batch = 4 * stop_after
    while drawn < max_draws:
        size = min(batch, max_draws - drawn)
        tables = rng.multivariate_hypergeometric(pooled, n_cur, size=size)
        hits = np.flatnonzero(_pearson_rows(tables, pooled_f, n_cur, n_base) >= bar)
        if exceed + hits.size >= stop_after:
            stopped = drawn + int(hits[stop_after - exceed - 1]) + 1
            return MonteCarloHomogeneity(observed, stop_after / stopped, stopped, stop_after)
        exceed += int(hits.size)
        drawn += size
        batch *= 5
    return MonteCarloHomogeneity(observed, (exceed + 1) / (max_draws + 1), max_draws, exceed)
