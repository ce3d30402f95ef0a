"""The design effect and effective sample size of a proportion with a known standard error
(Rao & Scott 1992, "A simple method for the analysis of clustered binary data", Biometrics
48:577-585: d = v / (p (1 - p) / n), effective size n / d, effective count k / d)."""

from __future__ import annotations

import math

import pytest

from service.stats.design_effect import design_effect, effective_counts


def test_design_effect_is_the_variance_ratio() -> None:
    # p = 0.2 of n = 1000: binomial variance 0.00016; a standard error of 0.02 is a variance
    # of 0.0004, so d = 0.0004 / 0.00016 = 2.5.
    assert design_effect(0.2, 1000, 0.02) == pytest.approx(2.5)
    k, n, d = effective_counts(200, 1000, 0.02)
    assert (k, n, d) == pytest.approx((80, 400, 2.5))
    assert k / n == pytest.approx(0.2)  # the proportion is unchanged
    # The effective size gives back the standard error: sqrt(p (1 - p) / n_eff) = se.
    assert math.sqrt(0.2 * 0.8 / n) == pytest.approx(0.02)


def test_never_below_one_and_one_where_undefined() -> None:
    assert design_effect(0.2, 1000, 0.001) == 1.0
    assert design_effect(0.0, 1000, 0.01) == 1.0
    assert design_effect(1.0, 1000, 0.01) == 1.0
    assert design_effect(0.3, 1000, math.nan) == 1.0
    assert effective_counts(30, 100, None) == (30, 100, 1.0)
    with pytest.raises(ValueError):
        design_effect(0.3, 0, 0.01)
