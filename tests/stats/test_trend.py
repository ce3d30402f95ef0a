"""The inverse-variance weighted trend, checked against statsmodels' WLS with the scale fixed
at 1 (Seabold & Perktold 2010, statsmodels: Econometric and statistical modeling with
Python)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from service.stats.trend import weighted_trend


def statsmodels_reference(
    t: np.ndarray, y: np.ndarray, v: np.ndarray
) -> tuple[float, float, float, float]:
    fit = sm.WLS(y, sm.add_constant(t), weights=1.0 / v).fit(cov_type="fixed scale")
    return fit.params[1], fit.bse[1], fit.tvalues[1], fit.pvalues[1]


def test_monthly_gaps_match_statsmodels() -> None:
    # Twelve months of a gap in checked rates, each with its binomial variance.
    rng = np.random.default_rng(8)
    t = np.arange(12.0)
    n = rng.integers(200, 900, size=12)
    p = 0.05 + 0.004 * t
    y = rng.binomial(n, p) / n
    v = p * (1 - p) / n
    trend = weighted_trend(t.tolist(), y.tolist(), v.tolist())
    slope, se, z, pv = statsmodels_reference(t, y, v)
    assert (trend.slope, trend.standard_error) == pytest.approx((slope, se), rel=1e-10)
    assert (trend.statistic, trend.p_value) == pytest.approx((z, pv), rel=1e-9)
    assert trend.points == 12


@settings(max_examples=150, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.floats(-50, 50, allow_nan=False),
            st.floats(-1, 1, allow_nan=False),
            st.floats(1e-4, 1.0, allow_nan=False),
        ),
        min_size=3,
        max_size=30,
    )
)
def test_matches_statsmodels_on_arbitrary_points(points: list[tuple[float, float, float]]) -> None:
    t, y, v = (np.array(column) for column in zip(*points, strict=True))
    assume(np.ptp(t) > 1e-3)  # all-equal times are refused (tested below)
    trend = weighted_trend(t, y, v)
    slope, se, z, pv = statsmodels_reference(t, y, v)
    assert trend.slope == pytest.approx(slope, rel=1e-7, abs=1e-9)
    assert trend.standard_error == pytest.approx(se, rel=1e-7)
    assert trend.statistic == pytest.approx(z, rel=1e-6, abs=1e-9)
    assert trend.p_value == pytest.approx(pv, rel=1e-6, abs=1e-12)


def test_shifting_time_and_scaling_variances() -> None:
    t, y, v = [1.0, 2.0, 3.0, 5.0], [0.10, 0.12, 0.11, 0.16], [1e-4, 2e-4, 1e-4, 3e-4]
    base = weighted_trend(t, y, v)
    shifted = weighted_trend([x + 2024 for x in t], y, v)
    assert shifted.slope == pytest.approx(base.slope, rel=1e-9)
    scaled = weighted_trend(t, y, [4 * x for x in v])
    assert scaled.slope == pytest.approx(base.slope, rel=1e-12)
    assert scaled.standard_error == pytest.approx(2 * base.standard_error, rel=1e-12)


def test_exact_line_with_no_noise() -> None:
    trend = weighted_trend([0, 1, 2, 3], [0.2, 0.25, 0.3, 0.35], [1e-3, 2e-3, 1e-3, 5e-4])
    assert trend.slope == pytest.approx(0.05, rel=1e-12)


def test_refuses_too_few_points_and_bad_variances() -> None:
    with pytest.raises(ValueError, match="at least 3"):
        weighted_trend([1, 2], [0.1, 0.2], [0.01, 0.01])
    with pytest.raises(ValueError, match="positive"):
        weighted_trend([1, 2, 3], [0.1, 0.2, 0.3], [0.01, 0.0, 0.01])
    with pytest.raises(ValueError, match="positive"):
        weighted_trend([1, 2, 3], [0.1, 0.2, 0.3], [0.01, -0.1, 0.01])
    with pytest.raises(ValueError, match="equal"):
        weighted_trend([2, 2, 2], [0.1, 0.2, 0.3], [0.01, 0.01, 0.01])
    with pytest.raises(ValueError, match="one length"):
        weighted_trend([1, 2, 3], [0.1, 0.2], [0.01, 0.01, 0.01])
