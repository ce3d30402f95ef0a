"""The few distribution functions the audit needs, from ``scipy.special`` (pure functions).

``scipy.stats`` builds every distribution object it knows when it is imported, which costs
about half a second of the audit command's start-up on the 2-core machine; the special
functions these are made of load in a fraction of that (and are loaded anyway). Each function
is checked against ``scipy.stats`` in ``tests/stats/test_distributions.py``.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from scipy.special import betainc, betaincc, chdtrc, gammaln, ndtr, xlog1py, xlogy

FloatArray = npt.NDArray[np.float64]
ArrayLike = npt.ArrayLike

_LOG_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)


def norm_cdf(x: ArrayLike) -> FloatArray:
    """Standard normal CDF."""
    return np.asarray(ndtr(x), dtype=np.float64)


def norm_sf(x: ArrayLike) -> FloatArray:
    """Standard normal upper tail ``P(Z > x)`` (exact in the tail: ``Phi(-x)``)."""
    return np.asarray(ndtr(np.negative(x)), dtype=np.float64)


def norm_pdf(x: ArrayLike) -> FloatArray:
    """Standard normal density."""
    z = np.asarray(x, dtype=np.float64)
    return np.asarray(np.exp(-0.5 * z * z - _LOG_SQRT_2PI), dtype=np.float64)


def chi2_sf(x: float, dof: float) -> float:
    """``P(X > x)`` for a chi-squared variable with ``dof`` degrees of freedom."""
    return float(chdtrc(dof, x))


def binom_cdf(k: float, n: float, p: float) -> float:
    """``P(K <= k)`` for ``K ~ Binomial(n, p)`` (0 below the support): the regularized
    incomplete beta ``1 - I_p(k + 1, n - k)``, as scipy.stats computes it."""
    if k < 0:
        return 0.0
    if k >= n:
        return 1.0
    return float(betaincc(k + 1.0, n - k, p))


def binom_sf(k: float, n: float, p: float) -> float:
    """``P(K > k)`` for ``K ~ Binomial(n, p)`` (1 below the support): ``I_p(k + 1, n - k)``."""
    if k < 0:
        return 1.0
    if k >= n:
        return 0.0
    return float(betainc(k + 1.0, n - k, p))


def binom_pmf(k: ArrayLike, n: float, p: float) -> FloatArray:
    """``P(K = k)`` for ``K ~ Binomial(n, p)``, in logs: ``ln C(n, k) + k ln p +
    (n - k) ln(1 - p)`` (``xlogy``/``xlog1py`` make ``0 ln 0 = 0`` at ``p`` = 0 or 1)."""
    kk = np.asarray(k, dtype=np.float64)
    with np.errstate(invalid="ignore"):  # outside the support: replaced by 0 below
        log_pmf = (
            gammaln(n + 1.0)
            - gammaln(kk + 1.0)
            - gammaln(n - kk + 1.0)
            + xlogy(kk, p)
            + xlog1py(n - kk, -p)
        )
    inside = (kk >= 0) & (kk <= n) & (kk == np.floor(kk))
    return np.where(inside, np.exp(log_pmf), 0.0).astype(np.float64)
