"""Exact binomial margin evidence for one rate against a fixed promised rate.

Reference implementation: scipy.stats.binomtest (exact one-sided binomial tests). The inside
p-value is TOST (Schuirmann 1987, J Pharmacokinet Biopharm 15:657-680) with exact one-sided
tests; the outside p-value is Bonferroni over the two directions.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binomtest

from service.stats.one_sample import rate_evidence

CASES = [
    (n, center, margin)
    for n in (1, 2, 7, 30, 263, 5_000)
    for center, margin in ((0.5, 0.05), (0.3, 0.1), (0.12, 0.02), (0.9, 0.08), (0.02, 0.015))
]


def _binomtest_p(k: int, n: int, p: float, alternative: str) -> float:
    return float(binomtest(k, n, p, alternative=alternative).pvalue)


@pytest.mark.parametrize(("n", "center", "margin"), CASES)
def test_matches_scipy_binomtest(n: int, center: float, margin: float) -> None:
    low, high = center - margin, center + margin
    for k in sorted({0, 1, round(n * low), round(n * center), round(n * high), n - 1, n}):
        if not 0 <= k <= n:
            continue
        ev = rate_evidence(k, n, center, margin)
        # scipy.stats.binomtest, exact one-sided tests at the two edges.
        inside = max(_binomtest_p(k, n, high, "less"), _binomtest_p(k, n, low, "greater"))
        above = _binomtest_p(k, n, high, "greater")
        below = _binomtest_p(k, n, low, "less")
        assert ev.p_inside == pytest.approx(inside, rel=1e-12, abs=1e-300)
        assert ev.p_outside == pytest.approx(min(1.0, 2 * min(above, below)), rel=1e-12)
        assert ev.side == ("above" if above <= below else "below")
        assert ev.estimate == k / n


def test_worked_binomial_values() -> None:
    # Exact arithmetic: P(X >= 9 | n = 10, p = 1/2) = (10 + 1) / 2^10 = 11/1024, and
    # P(X <= 1 | n = 10, p = 1/2) = 11/1024 by symmetry.
    ev = rate_evidence(9, 10, 0.25, 0.25)  # band [0, 0.5]: only the upper side exists
    assert ev.p_outside == pytest.approx(2 * 11 / 1024, rel=1e-12)
    assert ev.side == "above"
    ev = rate_evidence(1, 10, 0.75, 0.25)  # band [0.5, 1]: only the lower side exists
    assert ev.p_outside == pytest.approx(2 * 11 / 1024, rel=1e-12)
    assert ev.side == "below"
    # Inside: the lower test P(X >= 1 | 1/2) = 1023/1024; the upper side is impossible (0).
    assert ev.p_inside == pytest.approx(1023 / 1024, rel=1e-12)


def test_edges_at_or_beyond_the_ends() -> None:
    # Band [0.9, 1.0]: no region above; all successes in 50 trials hold by the lower test:
    # P(X >= 50 | 0.9) = 0.9^50 (exact arithmetic).
    ev = rate_evidence(50, 50, 0.95, 0.05)
    assert ev.p_inside == pytest.approx(0.9**50, rel=1e-12)
    assert ev.p_outside == 1.0  # the below side: P(X <= 50 | 0.9) = 1
    # The same with the edge beyond 1 (band [0.9, 1.1] clipped).
    assert rate_evidence(50, 50, 1.0, 0.1).p_inside == pytest.approx(0.9**50, rel=1e-12)
    # Band [0, 0.1], no successes: P(X <= 0 | 0.1) = 0.9^50.
    ev = rate_evidence(0, 50, 0.05, 0.05)
    assert ev.p_inside == pytest.approx(0.9**50, rel=1e-12)
    assert ev.p_outside == 1.0
    # A band covering [0, 1] always holds and never breaches.
    ev = rate_evidence(3, 10, 0.5, 0.6)
    assert (ev.p_inside, ev.p_outside) == (0.0, 1.0)
    # An edge exactly at 1: the upper outside test is impossible whatever k is.
    ev = rate_evidence(10, 10, 0.5, 0.5)
    assert (ev.p_inside, ev.p_outside) == (0.0, 1.0)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ((5, 3, 0.5, 0.1), "0 <= k <= n"),
        ((0, 0, 0.5, 0.1), "n >= 1"),
        ((1.5, 3, 0.5, 0.1), "integer"),
        ((True, 3, 0.5, 0.1), "integer"),
        ((1, 3, 1.2, 0.1), "center"),
        ((1, 3, 0.5, 0.0), "margin"),
        ((1, 3, 0.5, math.nan), "margin"),
    ],
)
def test_rejects_bad_input(args: tuple[float, ...], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        rate_evidence(*args)  # type: ignore[arg-type]


def test_accepts_numpy_integers() -> None:
    assert rate_evidence(np.int64(3), np.int64(10), 0.3, 0.1) == rate_evidence(3, 10, 0.3, 0.1)


bands = st.tuples(st.floats(0.0, 1.0), st.floats(0.001, 0.6))


@settings(max_examples=400, deadline=None)
@given(n=st.integers(1, 2_000), f=st.floats(0.0, 1.0), band=bands)
def test_properties_and_binomtest(n: int, f: float, band: tuple[float, float]) -> None:
    center, margin = band
    k = round(f * n)
    ev = rate_evidence(k, n, center, margin)
    assert 0.0 <= ev.p_inside <= 1.0 and 0.0 <= ev.p_outside <= 1.0
    assert not (ev.p_inside < 0.5 and ev.p_outside < 0.5)
    low, high = center - margin, center + margin
    if ev.p_outside < 0.5:
        assert (k / n > high) if ev.side == "above" else (k / n < low)
    # scipy.stats.binomtest for every edge strictly inside (0, 1).
    tests = []
    if 0.0 < high < 1.0:
        tests.append(_binomtest_p(k, n, high, "less"))
    if 0.0 < low < 1.0:
        tests.append(_binomtest_p(k, n, low, "greater"))
    assert ev.p_inside == pytest.approx(max(tests, default=0.0), rel=1e-12, abs=1e-300)


@settings(max_examples=100, deadline=None)
@given(n=st.integers(1, 500), band=bands)
def test_outside_evidence_grows_as_the_rate_leaves_the_band(
    n: int, band: tuple[float, float]
) -> None:
    center, margin = band
    ev = [rate_evidence(k, n, center, margin) for k in range(n + 1)]
    above = [e.p_outside for e in ev if e.estimate >= center + margin]
    below = [e.p_outside for e in reversed(ev) if e.estimate <= center - margin]
    for ps in (above, below):
        assert all(b <= a for a, b in itertools.pairwise(ps))
