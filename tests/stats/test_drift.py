"""Score drift: the homogeneity test against scipy, the Monte Carlo homogeneity test against an
exact enumeration and against scipy's chi-square p-value at large counts, the PSI against a
direct computation and its properties, and how often the PSI thresholds are crossed by chance."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2_contingency, multivariate_hypergeom

from service.stats.drift import (
    PSI_MAJOR,
    PSI_MODERATE,
    HomogeneityTest,
    homogeneity_mc_test,
    homogeneity_test,
    population_stability_index,
)


def direct_psi(b: np.ndarray, c: np.ndarray, floor: float) -> float:
    bs = np.maximum(b / b.sum(), floor)
    cs = np.maximum(c / c.sum(), floor)
    return float(np.sum((cs - bs) * np.log(cs / bs)))


@pytest.mark.parametrize("seed", range(5))
def test_homogeneity_matches_scipy(seed: int) -> None:
    rng = np.random.default_rng(seed)
    bins = int(rng.integers(2, 12))
    base = rng.integers(0, 200, size=bins)
    cur = rng.integers(0, 60, size=bins)
    base[0] = cur[0] = 0  # a bin empty in both: dropped
    ours = homogeneity_test(base.tolist(), cur.tolist())
    keep = (base + cur) > 0
    # scipy.stats.chi2_contingency without Yates's correction (it refuses empty columns).
    ref = chi2_contingency(np.vstack([base[keep], cur[keep]]), correction=False)
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert ours.dof == ref.dof == keep.sum() - 1
    assert ours.p_value == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-300)


def test_homogeneity_with_fractional_counts_and_one_bin() -> None:
    ref = chi2_contingency([[10.5, 3.25, 7.0], [2.0, 8.5, 1.0]], correction=False)
    ours = homogeneity_test([10.5, 3.25, 7.0], [2.0, 8.5, 1.0])
    assert (ours.statistic, ours.dof) == (pytest.approx(ref.statistic, rel=1e-12), ref.dof)
    # One non-empty bin: nothing to test (scipy gives the same on a 2 x 1 table).
    assert homogeneity_test([0, 7, 0], [0, 3, 0]) == HomogeneityTest(0.0, 0, 1.0)


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("floor", [1e-4, 1e-3])
def test_psi_matches_a_direct_computation(seed: int, floor: float) -> None:
    rng = np.random.default_rng(100 + seed)
    base = rng.integers(0, 300, size=10).astype(float)
    cur = rng.integers(0, 40, size=10).astype(float)
    cur[seed] = 0.0  # an empty bin: floored
    ours = population_stability_index(base.tolist(), cur.tolist(), floor)
    assert ours == pytest.approx(direct_psi(base, cur, floor), rel=1e-12)


def test_psi_hand_computed() -> None:
    # Shares (0.5, 0.5) against (1, 0 -> 1e-4): 0.5 ln 2 + (1e-4 - 0.5) ln(2e-4).
    expected = 0.5 * math.log(2.0) + (1e-4 - 0.5) * math.log(1e-4 / 0.5)
    assert population_stability_index([50, 50], [7, 0]) == pytest.approx(expected, rel=1e-12)
    # (0.2, 0.8) against (0.4, 0.6): 0.2 ln 2 - 0.2 ln(0.75).
    expected = 0.2 * math.log(2.0) - 0.2 * math.log(0.75)
    assert population_stability_index([1, 4], [2, 3]) == pytest.approx(expected, rel=1e-12)


counts = st.lists(st.integers(0, 1000), min_size=2, max_size=12)


@settings(max_examples=300, deadline=None)
@given(counts, counts, st.integers(1, 50))
def test_psi_properties(a: list[int], b: list[int], k: int) -> None:
    size = min(len(a), len(b))
    a, b = a[:size], b[:size]
    a[0] += 1  # neither sample empty
    b[-1] += 1
    psi = population_stability_index(a, b)
    assert psi >= 0.0
    assert psi == pytest.approx(population_stability_index(b, a), rel=1e-12, abs=1e-15)
    # Same shares, whatever the sizes: zero.
    assert population_stability_index(a, [k * x for x in a]) == pytest.approx(0.0, abs=1e-12)
    if any(x * sum(b) != y * sum(a) for x, y in zip(a, b, strict=True)):
        assert psi > 0.0


def test_bad_input_is_refused() -> None:
    with pytest.raises(ValueError, match="same number of bins"):
        population_stability_index([1, 2], [1, 2, 3])
    with pytest.raises(ValueError, match="no cases"):
        homogeneity_test([1, 2], [0, 0])
    with pytest.raises(ValueError, match="non-negative"):
        homogeneity_test([1, -2], [1, 1])
    with pytest.raises(ValueError, match="floor"):
        population_stability_index([1, 2], [2, 1], floor=0.0)


def chance_psi(n: int, reps: int, rng: np.random.Generator) -> np.ndarray:
    deciles = [0.1] * 10
    days = rng.multinomial(n, deciles, size=reps)
    return np.array([population_stability_index(deciles, d.tolist()) for d in days])


def test_chance_psi_by_daily_sample_size() -> None:
    """How often the thresholds are crossed when nothing has changed: a day of ``n`` scores
    from the baseline distribution, 10 bins cut at the baseline's deciles (shares exactly 0.1).
    Measured with 20,000 days per size (default_rng(20240610)):

        n/day  P(PSI > 0.1)  P(PSI > 0.25)  mean PSI  (9/n)
        20     0.999         0.870          1.110     0.450   (79% of days have an empty bin)
        50     0.865         0.282          0.227     0.180
        100    0.387         0.008          0.095     0.090
        500    0 of 20,000   0 of 20,000    0.018     0.018
        2000   0 of 20,000   0 of 20,000    0.005     0.0045

    This test repeats a smaller run of the same simulation.
    """
    rng = np.random.default_rng(7)
    small, medium = chance_psi(20, 2000, rng), chance_psi(100, 2000, rng)
    assert np.mean(small > PSI_MODERATE) > 0.99
    assert np.mean(small > PSI_MAJOR) > 0.8
    assert 0.3 < np.mean(medium > PSI_MODERATE) < 0.48
    large = chance_psi(2000, 2000, rng)
    assert np.mean(large > PSI_MODERATE) == 0.0
    # n * PSI is close to chi-square with 9 degrees of freedom (mean 9) once bins are full.
    assert np.mean(large) * 2000 == pytest.approx(9.0, rel=0.05)


def exact_conditional_p(baseline: list[int], current: list[int]) -> float:
    """P(X^2 >= observed) over every 2 x B table with the observed margins, each weighted by
    its multivariate hypergeometric probability (scipy.stats.multivariate_hypergeom), with
    X^2 from scipy.stats.chi2_contingency (Pearson 1900): the exact conditional test of
    homogeneity given both margins (Freeman and Halton 1951, Biometrika 38:141-149, with
    Pearson's statistic as the ordering)."""
    pooled = [b + c for b, c in zip(baseline, current, strict=True)]
    n = sum(current)

    def stat(day: tuple[int, ...]) -> float:
        table = [[t - x for t, x in zip(pooled, day, strict=True)], list(day)]
        return float(chi2_contingency(table, correction=False).statistic)

    observed = stat(tuple(current))
    total = 0.0
    for day in itertools.product(*[range(min(t, n) + 1) for t in pooled]):
        if sum(day) == n and stat(day) >= observed - 1e-9:
            total += float(multivariate_hypergeom.pmf(list(day), m=pooled, n=n))
    return total


@pytest.mark.parametrize(
    ("baseline", "current", "too_small"),
    [
        ([6, 9, 4, 3], [0, 2, 4, 3], False),  # small bins (exact 0.121, chi-square 0.108)
        ([1, 15, 9, 10], [2, 0, 0, 5], True),  # a near-empty baseline bin (0.0061, 0.0042)
        ([0, 10, 7, 9], [2, 1, 1, 1], True),  # cases in an empty baseline bin (0.024, 0.011)
        ([0, 1, 20, 20], [1, 1, 2, 2], True),  # two near-empty bins (0.044, 0.020)
    ],
)
def test_monte_carlo_p_value_matches_an_exact_enumeration(
    baseline: list[int], current: list[int], too_small: bool
) -> None:
    exact = exact_conditional_p(baseline, current)
    draws = 200_000
    # No early stop (stop_after above max_draws): the fixed-size Monte Carlo p-value of Hope
    # (1968), (g + 1) / (draws + 1), whose standard error is about sqrt(p (1 - p) / draws).
    ours = homogeneity_mc_test(
        baseline, current, max_draws=draws, seed=[3, sum(current)], stop_after=draws + 1
    )
    assert ours.draws == draws
    # The same statistic as the chi-square test (checked against scipy above).
    assert ours.statistic == pytest.approx(homogeneity_test(baseline, current).statistic)
    se = math.sqrt(exact * (1 - exact) / draws)
    assert ours.p_value == pytest.approx(exact, abs=4 * se + 1 / draws)
    if too_small:  # where the defect came from: the chi-square p-value is too small
        assert homogeneity_test(baseline, current).p_value < exact - 8 * se


def test_monte_carlo_p_value_agrees_with_chi_square_at_large_counts() -> None:
    # Expected counts in the hundreds: Pearson's chi-square approximation holds (scipy.stats.
    # chi2_contingency's p-value, Pearson 1900), and the exact conditional p-value is close.
    baseline = [1000, 980, 1010, 1005, 995, 1002, 990, 1008, 1003, 1007]
    current = [460, 410, 405, 400, 395, 390, 380, 370, 340, 450]
    ref = chi2_contingency([baseline, current], correction=False)
    draws = 40_000
    ours = homogeneity_mc_test(baseline, current, max_draws=draws, seed=9, stop_after=draws + 1)
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert 0.01 < ref.pvalue < 0.2
    se = math.sqrt(ref.pvalue * (1 - ref.pvalue) / draws)
    assert ours.p_value == pytest.approx(ref.pvalue, abs=5 * se + 0.002)


def test_sequential_p_value_stops_early_and_keeps_its_level() -> None:
    baseline = [40, 35, 30, 25, 20, 15, 10, 5, 2, 1]
    pooled = np.array(baseline) + 30  # margins of the tables drawn below
    rng = np.random.default_rng(11)
    alpha = 0.05
    p_values, draws = [], []
    for i in range(2000):
        # A day from the null: given the margins, the day's bins are a draw without
        # replacement from the pooled table (numpy's multivariate hypergeometric sampler).
        day = rng.multivariate_hypergeometric(pooled, 30)
        base = (pooled - day).tolist()
        t = homogeneity_mc_test(base, day.tolist(), max_draws=5000, seed=[11, i])
        p_values.append(t.p_value)
        draws.append(t.draws)
        if t.draws < 5000:
            # Besag and Clifford (1991, Biometrika 78:301-304): stopped at the h-th
            # exceedance after l draws, p = h / l.
            assert t.exceedances == 10 and t.p_value == pytest.approx(10 / t.draws)
        else:
            assert t.p_value == pytest.approx((t.exceedances + 1) / 5001)
    # Valid at any level: P(p <= alpha) <= alpha (binomial slack of 3 standard errors).
    rate = np.mean(np.array(p_values) <= alpha)
    assert rate <= alpha + 3 * math.sqrt(alpha * (1 - alpha) / 2000)
    assert rate > 0.02  # and not far below it (the statistic is nearly continuous here)
    assert np.median(draws) < 40  # most null days stop after a few dozen draws


def test_one_case_in_an_empty_baseline_bin_is_not_extreme() -> None:
    # The defect's reproducer (error-rates.md): the chi-square p-value is 6.7e-06.
    baseline = [0, 16, 44, 66, 153, 200, 307, 365, 372, 425]
    day = [1, 0, 1, 2, 4, 5, 8, 9, 9, 10]
    assert homogeneity_test(baseline, day).p_value < 1e-5
    ours = homogeneity_mc_test(baseline, day, max_draws=100_000, seed=1)
    # Given the margins the lone pooled row of the first bin is in the day's sample with
    # probability 49 / 1997 (hypergeometric), so the exact p-value is at least that.
    assert ours.p_value > 0.01
    again = homogeneity_mc_test(baseline, day, max_draws=100_000, seed=1)
    assert again == ours  # same seed, same p-value


def test_monte_carlo_test_edge_cases() -> None:
    assert homogeneity_mc_test([0, 7, 0], [0, 3, 0], max_draws=10, seed=0).p_value == 1.0
    with pytest.raises(ValueError, match="whole counts"):
        homogeneity_mc_test([1.5, 2], [1, 1], max_draws=10, seed=0)
    with pytest.raises(ValueError, match="max_draws"):
        homogeneity_mc_test([1, 2], [1, 1], max_draws=0, seed=0)
    # A shift far beyond chance: no draw reaches it, the p-value is 1 / (max_draws + 1).
    far = homogeneity_mc_test([500, 500], [0, 400], max_draws=999, seed=0)
    assert (far.p_value, far.draws, far.exceedances) == (1 / 1000, 999, 0)
