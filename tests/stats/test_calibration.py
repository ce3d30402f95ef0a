"""Spiegelhalter's test from power sums and the reliability table: checked against a direct
row-by-row computation, a published worked example, simulation and statsmodels."""

from __future__ import annotations

import math
from collections.abc import Callable
from itertools import pairwise

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import kstest, norm
from statsmodels.stats.proportion import proportion_confint

from service.stats.calibration import (
    CalibrationTest,
    PowerSums,
    ReliabilityBin,
    observed_expected_test,
    reliability_table,
    spiegelhalter_test,
)


def direct_z(p: np.ndarray, y: np.ndarray) -> float:
    """Spiegelhalter 1986, written row by row: sum (y-p)(1-2p) / sqrt(sum (1-2p)^2 p (1-p))."""
    num = 0.0
    var = 0.0
    for pi, yi in zip(p.tolist(), y.tolist(), strict=True):
        num += (yi - pi) * (1.0 - 2.0 * pi)
        var += (1.0 - 2.0 * pi) ** 2 * pi * (1.0 - pi)
    return num / math.sqrt(var)


@pytest.mark.parametrize(("seed", "n"), [(1, 3), (2, 50), (3, 1000), (4, 20_000)])
def test_power_sums_give_the_row_by_row_statistic(seed: int, n: int) -> None:
    rng = np.random.default_rng(seed)
    p = rng.beta(0.7, 1.5, size=n)
    y = (rng.random(n) < np.clip(p * 1.2, 0, 1)).astype(int)
    result = spiegelhalter_test(PowerSums.from_rows(p, y))
    assert result.statistic == pytest.approx(direct_z(p, y), abs=1e-12, rel=1e-12)
    assert result.observed == y.sum()
    assert result.expected == pytest.approx(p.sum(), rel=1e-14)


# Rufibach 2010, "Use of Brier score to assess binary predictions", J Clin Epidemiol, Table 1:
# outcomes x = (1, 0); forecasts (0.2, 0.2) give Z = 1.06 and (0.4, 0.5) give Z = 1.22.
@pytest.mark.parametrize(("p", "z"), [((0.2, 0.2), 1.06), ((0.4, 0.5), 1.22)])
def test_published_worked_example(p: tuple[float, float], z: float) -> None:
    result = spiegelhalter_test(PowerSums.from_rows(p, (1, 0)))
    assert result.statistic == pytest.approx(z, abs=0.005)


def test_is_standard_normal_under_calibration() -> None:
    rng = np.random.default_rng(20240601)
    stats = []
    for _ in range(600):
        p = rng.beta(2.0, 5.0, size=400)
        y = (rng.random(p.size) < p).astype(int)
        stats.append(spiegelhalter_test(PowerSums.from_rows(p, y)).statistic)
    # Loose bound: a correct statistic fails this once in 1,000 runs of a fresh generator.
    assert kstest(stats, "norm").pvalue > 0.001
    # Nominal 5% two-sided; the binomial standard deviation over 600 runs is 0.009.
    rejections = np.mean([abs(z) > 1.959963984540054 for z in stats])
    assert 0.03 < rejections < 0.075


@pytest.mark.parametrize(
    "truth",
    [
        lambda p: 0.7 * p,  # scores too high
        lambda p: np.minimum(1.0, 1.3 * p),  # scores too low
        lambda p: 1.0 / (1.0 + np.exp(-0.4 * np.log(p / (1 - p)))),  # over-confident scores
        lambda p: 1.0 / (1.0 + np.exp(-2.0 * np.log(p / (1 - p)))),  # under-confident scores
    ],
    ids=["too-high", "too-low", "over-confident", "under-confident"],
)
def test_rejects_miscalibrated_scores(truth: Callable[[np.ndarray], np.ndarray]) -> None:
    rng = np.random.default_rng(7)
    p = rng.uniform(0.02, 0.98, size=2000)
    y = (rng.random(p.size) < truth(p)).astype(int)
    assert spiegelhalter_test(PowerSums.from_rows(p, y)).p_value < 1e-6


def test_a_shift_across_one_half_needs_the_observed_expected_test() -> None:
    # Scores symmetric about 1/2, every true probability 0.1 lower: the (1 - 2p) weights
    # cancel, so Spiegelhalter's Z does not see it; observed against expected does.
    rng = np.random.default_rng(8)
    p = rng.uniform(0.12, 0.88, size=4000)
    y = (rng.random(p.size) < p - 0.1).astype(int)
    sums = PowerSums.from_rows(p, y)
    assert spiegelhalter_test(sums).p_value > 0.01
    assert observed_expected_test(sums).p_value < 1e-6


def test_observed_expected_test_direct_and_under_calibration() -> None:
    rng = np.random.default_rng(9)
    stats = []
    for _ in range(600):
        p = rng.beta(1.0, 6.0, size=300)
        y = (rng.random(p.size) < p).astype(int)
        result = observed_expected_test(PowerSums.from_rows(p, y))
        direct = (y.sum() - p.sum()) / math.sqrt(float(np.sum(p * (1 - p))))
        assert result.statistic == pytest.approx(direct, abs=1e-12, rel=1e-12)
        stats.append(result.statistic)
    assert kstest(stats, "norm").pvalue > 0.001
    with pytest.raises(ValueError, match="variance"):
        observed_expected_test(PowerSums.from_rows([0.0, 1.0], [0, 1]))


def test_p_value_is_two_sided() -> None:
    up = spiegelhalter_test(PowerSums.from_rows([0.2, 0.2], [1, 0]))
    # Standard normal, two-sided: P(|Z| > 1.0607) = 0.2888 (from memory, normal table).
    assert up.p_value == pytest.approx(0.2888, abs=5e-4)
    down = spiegelhalter_test(PowerSums.from_rows([0.2, 0.2], [0, 0]))
    assert down.statistic < 0
    assert down.p_value == pytest.approx(2 * norm.sf(-down.statistic), rel=1e-12)
    # Swapping the labels (p -> 1 - p, y -> 1 - y) leaves Z unchanged.
    swapped = spiegelhalter_test(PowerSums.from_rows([0.8, 0.8], [0, 1]))
    assert swapped.statistic == pytest.approx(up.statistic, abs=1e-12)
    assert isinstance(up, CalibrationTest)


@pytest.mark.parametrize("p", [[0.5], [0.5, 0.5, 0.5], [0.0, 0.5, 1.0], [1.0, 1.0], [0.0]], ids=str)
def test_refuses_a_zero_variance(p: list[float]) -> None:
    with pytest.raises(ValueError, match="variance"):
        spiegelhalter_test(PowerSums.from_rows(p, [1] * len(p)))


def test_refuses_no_cases() -> None:
    with pytest.raises(ValueError, match="at least one case"):
        spiegelhalter_test(PowerSums())


def test_from_rows_rejects_bad_rows() -> None:
    with pytest.raises(ValueError, match="length"):
        PowerSums.from_rows([0.1, 0.2], [1])
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        PowerSums.from_rows([1.2], [1])
    with pytest.raises(ValueError, match="0 or 1"):
        PowerSums.from_rows([0.3], [2])


unit = st.floats(0.0, 1.0, allow_nan=False)
rows = st.lists(st.tuples(unit, st.integers(0, 1)), max_size=30)


@settings(max_examples=200, deadline=None)
@given(rows, rows)
def test_sums_of_parts_add_up(a: list[tuple[float, int]], b: list[tuple[float, int]]) -> None:
    def sums(r: list[tuple[float, int]]) -> PowerSums:
        return PowerSums.from_rows([x for x, _ in r], [y for _, y in r])

    joined, added = sums(a + b), sums(a) + sums(b)
    assert joined.n == added.n
    for field in ("sum_y", "sum_p", "sum_p2", "sum_p3", "sum_p4", "sum_yp"):
        assert getattr(joined, field) == pytest.approx(getattr(added, field), abs=1e-12)


def test_reliability_table_matches_binned_rows_and_statsmodels() -> None:
    rng = np.random.default_rng(11)
    p = rng.beta(1.2, 3.0, size=3000)
    y = (rng.random(p.size) < p).astype(int)
    edges = [0.0, 0.1, 0.2, 0.4, 0.7, 0.95, 1.0]
    which = np.digitize(p, edges[1:-1])  # bin i holds edges[i] <= p < edges[i + 1]
    counts = [int((which == i).sum()) for i in range(6)]
    positives = [int(y[which == i].sum()) for i in range(6)]
    score_sums = [float(p[which == i].sum()) for i in range(6)]
    table = reliability_table(edges, counts, positives, score_sums)
    assert [(b.low, b.high) for b in table] == list(pairwise(edges))
    for i, b in enumerate(table):
        if counts[i] == 0:
            assert b == ReliabilityBin(edges[i], edges[i + 1], 0, 0, None, None, None, None)
            continue
        assert b.mean_score == pytest.approx(p[which == i].mean(), rel=1e-12)
        assert b.observed == pytest.approx(y[which == i].mean(), rel=1e-12)
        ref = proportion_confint(positives[i], counts[i], alpha=0.05, method="wilson")
        assert (b.observed_low, b.observed_high) == pytest.approx(ref, abs=1e-12)
    assert sum(b.n for b in table) == p.size


def test_reliability_table_empty_bin_and_bad_input() -> None:
    table = reliability_table([0.0, 0.5, 1.0], [0, 4], [0, 1], [0.0, 2.6])
    assert table[0].n == 0 and table[0].observed is None and table[0].observed_low is None
    assert table[1].mean_score == pytest.approx(0.65)
    with pytest.raises(ValueError, match="increasing"):
        reliability_table([0.0, 0.5, 0.5, 1.0], [1, 1, 1], [0, 0, 0], [0.2, 0.5, 0.7])
    with pytest.raises(ValueError, match="2 bins"):
        reliability_table([0.0, 0.5, 1.0], [1], [0], [0.2])
    with pytest.raises(ValueError, match="positives <= count"):
        reliability_table([0.0, 1.0], [2], [3], [1.0])
    with pytest.raises(ValueError, match="outside the bin"):
        reliability_table([0.0, 0.5, 1.0], [2, 2], [1, 1], [1.8, 1.2])  # sums swapped
    with pytest.raises(ValueError, match="empty bin"):
        reliability_table([0.0, 0.5, 1.0], [0, 2], [0, 1], [0.3, 1.2])
