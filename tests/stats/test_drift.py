"""Score drift: the homogeneity test against scipy, the PSI against a direct computation and
its properties, and how often the PSI thresholds are crossed by chance."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2_contingency

from service.stats.drift import (
    PSI_MAJOR,
    PSI_MODERATE,
    HomogeneityTest,
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
