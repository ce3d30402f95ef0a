"""The audit's distribution functions (``service.stats.distributions``) against scipy.stats
(Virtanen et al., "SciPy 1.0: fundamental algorithms for scientific computing in Python",
Nature Methods 17, 2020): the reference implementation they replace on the audit's path."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from service.stats import distributions as d


@pytest.mark.parametrize("x", [-40.0, -8.5, -1.96, -0.3, 0.0, 0.7, 1.96, 6.0, 38.0])
def test_normal_functions_equal_scipy_stats(x: float) -> None:
    assert float(d.norm_cdf(x)) == pytest.approx(stats.norm.cdf(x), rel=1e-12, abs=0.0)
    assert float(d.norm_sf(x)) == pytest.approx(stats.norm.sf(x), rel=1e-12, abs=0.0)
    assert float(d.norm_pdf(x)) == pytest.approx(stats.norm.pdf(x), rel=1e-12, abs=1e-300)


@pytest.mark.parametrize(("x", "dof"), [(0.5, 1), (3.84, 1), (12.0, 4), (40.0, 8), (300.0, 20)])
def test_chi2_tail_equals_scipy_stats(x: float, dof: int) -> None:
    assert d.chi2_sf(x, dof) == pytest.approx(stats.chi2.sf(x, dof), rel=1e-10)


@pytest.mark.parametrize(
    ("n", "p"), [(1, 0.5), (10, 0.3), (57, 0.02), (400, 0.35), (5000, 0.5), (20, 0.0), (20, 1.0)]
)
def test_binomial_functions_equal_scipy_stats(n: int, p: float) -> None:
    k = np.arange(-2, n + 3)
    expected = stats.binom.pmf(k, n, p)
    got = d.binom_pmf(k, n, p)
    big = expected > 1e-300
    assert np.allclose(got[big], expected[big], rtol=1e-9, atol=0.0)
    assert np.all(got[~big] <= 1e-290)
    for kk in (-1, 0, n // 3, n // 2, n - 1, n):
        assert d.binom_cdf(kk, n, p) == pytest.approx(stats.binom.cdf(kk, n, p), rel=1e-10)
        assert d.binom_sf(kk, n, p) == pytest.approx(
            stats.binom.sf(kk, n, p), rel=1e-10, abs=1e-300
        )
