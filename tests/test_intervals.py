"""Interval checks against statsmodels and published worked examples."""

import pytest
from scipy.stats import binomtest
from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint

from service.stats.proportions import Z95, newcombe_difference_interval, wilson_interval

# Newcombe 1998a (Statistics in Medicine 17:857-872), Table I, Wilson score method;
# secondary: quoted by several independent sources, primary table not seen.
WILSON_EXAMPLES = [
    (81, 263, 0.2553, 0.3662),
    (15, 148, 0.0624, 0.1605),
    (0, 20, 0.0000, 0.1611),
    (1, 29, 0.0061, 0.1718),
]

# Newcombe 1998b (Statistics in Medicine 17:873-890), Table II, method 10;
# secondary: quoted by several independent sources, primary table not seen.
NEWCOMBE_EXAMPLES = [
    (56, 70, 48, 80, 0.0524, 0.3339),
    (9, 10, 3, 10, 0.1705, 0.8090),
    (6, 7, 2, 7, 0.0582, 0.8062),
    (5, 56, 0, 29, -0.0381, 0.1926),
    (0, 10, 0, 20, -0.1611, 0.2775),
    (0, 10, 0, 10, -0.2775, 0.2775),
    (10, 10, 0, 20, 0.6791, 1.0000),
    (10, 10, 0, 10, 0.6075, 1.0000),
]


@pytest.mark.parametrize(("k", "n", "low", "high"), WILSON_EXAMPLES)
def test_wilson_published_examples(k: int, n: int, low: float, high: float) -> None:
    lo, hi = wilson_interval(k, n)
    assert lo == pytest.approx(low, abs=5e-5)
    assert hi == pytest.approx(high, abs=5e-5)


@pytest.mark.parametrize("n", [1, 2, 7, 30, 263, 10_000])
def test_wilson_matches_statsmodels_and_scipy(n: int) -> None:
    for k in sorted({0, 1, n // 3, n // 2, n - 1, n}):
        ours = wilson_interval(k, n)
        # statsmodels proportion_confint(method="wilson"); scipy binomtest().proportion_ci.
        ref = proportion_confint(k, n, alpha=0.05, method="wilson")
        assert ours == pytest.approx(ref, abs=1e-12)
        ci = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
        assert ours == pytest.approx((ci.low, ci.high), abs=1e-12)


@pytest.mark.parametrize(("k1", "n1", "k2", "n2", "low", "high"), NEWCOMBE_EXAMPLES)
def test_newcombe_published_examples(
    k1: int, n1: int, k2: int, n2: int, low: float, high: float
) -> None:
    lo, hi = newcombe_difference_interval(k1, n1, k2, n2)
    assert lo == pytest.approx(low, abs=5e-5)
    assert hi == pytest.approx(high, abs=5e-5)


@pytest.mark.parametrize(
    ("k1", "n1", "k2", "n2"), [(56, 70, 48, 80), (3, 40, 17, 51), (0, 5, 5, 5)]
)
def test_newcombe_matches_statsmodels(k1: int, n1: int, k2: int, n2: int) -> None:
    # statsmodels confint_proportions_2indep(compare="diff", method="newcomb").
    ref = confint_proportions_2indep(k1, n1, k2, n2, compare="diff", method="newcomb", alpha=0.05)
    assert newcombe_difference_interval(k1, n1, k2, n2) == pytest.approx(ref, abs=1e-9)


def test_z_is_the_exact_normal_quantile() -> None:
    from scipy.stats import norm

    assert norm.ppf(0.975) == pytest.approx(Z95, abs=1e-15)


def test_rejects_impossible_counts() -> None:
    with pytest.raises(ValueError):
        wilson_interval(5, 3)
