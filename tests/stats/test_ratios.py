"""The log (Katz) interval and test for p1 / p2, and the four-fifths floor evidence.

Reference implementation: statsmodels ``confint_proportions_2indep`` and
``test_proportions_2indep`` with ``compare="ratio", method="log"`` (Katz, Baptista, Azen &
Pike 1978, Biometrics 34:469-474). statsmodels applies no zero-cell rule for "log": a zero
success count gives nan (or ZeroDivisionError for Python ints in the interval), and two
samples without failures give se = 0 (interval (1, 1), statistic inf). Its "log-adjusted"
method adds 0.5 to each count and to each sample size (not to the failure cells) always.
Ours adds 0.5 to all four cells when any cell is 0 (Haldane-Anscombe; common practice); with
a zero cell the check is statsmodels "log" on the corrected table.
"""

from __future__ import annotations

import itertools
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats import proportion as sm_proportion

from service.stats.proportions import Z95
from service.stats.ratios import katz_ratio_interval, log_ratio_test, ratio_floor_evidence

TABLES = [
    (56, 70, 48, 80),
    (3, 40, 17, 51),
    (1, 1, 1, 2),
    (480, 1000, 610, 1000),
    (25_000, 90_000, 31_000, 80_000),
    (12.25, 40.5, 19.75, 33.0),  # expected counts of a randomized rule
    (0.3, 7.0, 6.2, 9.0),
]
ZERO_TABLES = [(0, 10, 0, 10), (0, 10, 3, 10), (3, 10, 0, 10), (10, 10, 3, 10), (2, 2, 2, 2)]
RATIO_VALUES = [0.5, 0.8, 1.0, 1.25]


def _corrected(k1: float, n1: float, k2: float, n2: float) -> tuple[float, float, float, float]:
    if min(k1, n1 - k1, k2, n2 - k2) == 0:
        return k1 + 0.5, n1 + 1, k2 + 0.5, n2 + 1
    return k1, n1, k2, n2


@pytest.mark.parametrize("table", TABLES + ZERO_TABLES)
@pytest.mark.parametrize("z", [Z95, 1.0, 2.5758293035489004])
def test_interval_matches_statsmodels(table: tuple[float, ...], z: float) -> None:
    from scipy.stats import norm

    # confint_proportions_2indep(compare="ratio", method="log", alpha=2 * sf(z)).
    ref = sm_proportion.confint_proportions_2indep(
        *_corrected(*table), compare="ratio", method="log", alpha=2 * norm.sf(z)
    )
    assert katz_ratio_interval(*table, z=z) == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("table", TABLES + ZERO_TABLES)
@pytest.mark.parametrize("value", RATIO_VALUES)
@pytest.mark.parametrize("alternative", ["larger", "smaller"])
def test_test_matches_statsmodels(table: tuple[float, ...], value: float, alternative: str) -> None:
    # test_proportions_2indep(compare="ratio", method="log", value=..., alternative=...).
    ref = sm_proportion.test_proportions_2indep(
        *_corrected(*table), compare="ratio", method="log", value=value, alternative=alternative
    )
    ours = log_ratio_test(*table, value=value, alternative=alternative)  # type: ignore[arg-type]
    assert ours.statistic == pytest.approx(float(ref.statistic), rel=1e-9, abs=1e-12)
    assert ours.p_value == pytest.approx(float(ref.pvalue), abs=1e-12)


@pytest.mark.parametrize("table", TABLES + ZERO_TABLES)
@pytest.mark.parametrize("floor", [0.8, 0.9])
def test_floor_evidence_is_the_two_one_sided_tests(table: tuple[float, ...], floor: float) -> None:
    ev = ratio_floor_evidence(*table, floor=floor)
    inside = sm_proportion.test_proportions_2indep(
        *_corrected(*table), compare="ratio", method="log", value=floor, alternative="larger"
    )
    outside = sm_proportion.test_proportions_2indep(
        *_corrected(*table), compare="ratio", method="log", value=floor, alternative="smaller"
    )
    assert ev.p_inside == pytest.approx(float(inside.pvalue), abs=1e-12)
    assert ev.p_outside == pytest.approx(float(outside.pvalue), abs=1e-12)
    assert ev.side == "below"
    k1, n1, k2, n2 = _corrected(*table)
    assert ev.estimate == pytest.approx((k1 / n1) / (k2 / n2), rel=1e-12)


def test_zero_rule_values() -> None:
    # 0/10 vs 3/10 becomes 0.5/11 vs 3.5/11 (Haldane-Anscombe, common practice):
    # ln r = ln(0.5 / 3.5), se^2 = 1/0.5 - 1/11 + 1/3.5 - 1/11.
    low, high = katz_ratio_interval(0, 10, 3, 10)
    log_r = math.log(0.5 / 3.5)
    se = math.sqrt(1 / 0.5 - 2 / 11 + 1 / 3.5)
    assert (low, high) == pytest.approx((math.exp(log_r - Z95 * se), math.exp(log_r + Z95 * se)))
    # Two samples without failures: no longer se = 0 (which would claim certainty).
    low, high = katz_ratio_interval(2, 2, 2, 2)
    assert low < 1.0 < high
    assert 0.05 < ratio_floor_evidence(2, 2, 2, 2, 0.8).p_inside < 0.95


fractions = st.floats(min_value=0.0, max_value=1.0)
sizes = st.floats(min_value=0.5, max_value=1e6)


@settings(max_examples=300, deadline=None)
@given(n1=sizes, n2=sizes, f1=fractions, f2=fractions, floor=st.floats(0.05, 2.0))
def test_evidence_properties(n1: float, n2: float, f1: float, f2: float, floor: float) -> None:
    ev = ratio_floor_evidence(f1 * n1, n1, f2 * n2, n2, floor)
    low, high = katz_ratio_interval(f1 * n1, n1, f2 * n2, n2)
    assert math.isfinite(ev.p_inside) and math.isfinite(ev.p_outside)
    # (the estimate is inf only when k2 / n2 underflows; high is inf when a tiny
    # non-integer count makes se huge)
    assert ev.estimate > 0.0
    if f2 * n2 >= 1e-6:
        assert math.isfinite(ev.estimate)
    assert 0.0 <= ev.p_inside <= 1.0 and 0.0 <= ev.p_outside <= 1.0
    assert not (ev.p_inside < 0.5 and ev.p_outside < 0.5)
    assert ev.p_inside + ev.p_outside == pytest.approx(1.0, abs=1e-12)
    assert 0.0 <= low <= ev.estimate <= high
    if ev.p_outside < 0.5:
        assert ev.estimate < floor
    if ev.p_inside < 0.5:
        assert ev.estimate > floor


@settings(max_examples=150, deadline=None)
@given(
    n1=st.integers(1, 300),
    n2=st.integers(1, 300),
    f2=fractions,
    floor=st.sampled_from([0.5, 0.8, 0.9, 1.0]),
)
def test_monotone_in_k1_near_and_above_the_floor(n1: int, n2: int, f2: float, floor: float) -> None:
    # More successes in sample 1 never strengthen the evidence of a breach (and never weaken
    # the evidence of holding) while r_hat >= floor / 4. Excluded: the step into k1 = n1,
    # where the zero-cell rule starts: its half-case correction can move a p-value the wrong
    # way by up to 2.4e-4 (largest found on a grid of n1 <= 300, n2 <= 300, e.g. 299/300 ->
    # 300/300 against 20/21 at floor 0.9: p_inside 0.00102 -> 0.00126), so that step is only
    # held to 5e-4.
    k2 = round(f2 * n2)
    ev = [ratio_floor_evidence(k1, n1, k2, n2, floor) for k1 in range(n1 + 1)]
    for k1, (a, b) in enumerate(itertools.pairwise(ev)):
        if a.estimate >= floor / 4 and k1 + 1 < n1:
            assert b.p_outside >= a.p_outside - 1e-12
            assert b.p_inside <= a.p_inside + 1e-12
        if k1 + 1 == n1:
            assert b.p_outside >= a.p_outside - 5e-4
            assert b.p_inside <= a.p_inside + 5e-4


def test_not_monotone_far_below_the_floor() -> None:
    # A property of the log (Katz) method, not of the zero rule: vs 10/20 at floor 0.8,
    # 1/20 gives stronger breach evidence than 2/20 (z = ln(0.125) / 1 = -2.079 against
    # ln(0.25) / sqrt(0.5) = -1.961) and than 0/20 (corrected 0.5/21 vs 10.5/21).
    p = [ratio_floor_evidence(k1, 20, 10, 20, 0.8).p_outside for k1 in (0, 1, 2)]
    assert p[1] < p[0] and p[1] < p[2]
    from scipy.stats import norm

    assert p[1] == pytest.approx(norm.cdf(math.log(0.125)), abs=1e-12)
    assert p[2] == pytest.approx(norm.cdf(math.log(0.25) / math.sqrt(0.5)), abs=1e-12)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ((5, 3, 1, 3), "0 <= k <= n"),
        ((1, 0, 1, 3), "n > 0"),
        ((math.inf, 3, 1, 3), "finite"),
    ],
)
def test_rejects_bad_counts(args: tuple[float, ...], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        katz_ratio_interval(*args)


def test_rejects_bad_value_alternative_and_z() -> None:
    with pytest.raises(ValueError, match="value"):
        log_ratio_test(1, 3, 1, 3, 0.0, "larger")
    with pytest.raises(ValueError, match="alternative"):
        log_ratio_test(1, 3, 1, 3, 0.8, "two-sided")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="z"):
        katz_ratio_interval(1, 3, 1, 3, z=0.0)
