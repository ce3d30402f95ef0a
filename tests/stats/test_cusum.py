"""CUSUM increments, paths and the run-length chain, checked against simulation, scipy and
an independent integral-equation solution."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binom, norm

from service.stats.cusum import (
    CONTROL_LIMIT_PRECISION,
    EXACT_CASE_LIMIT,
    StepDistribution,
    average_run_length,
    binomial_llr,
    binomial_step_distribution,
    coarsened,
    control_limit,
    cusum_path,
    mixture,
    risk_adjusted_llr,
    risk_adjusted_step_distribution,
    run_length_cdf,
)

FloatArray = npt.NDArray[np.float64]
Sampler = Callable[[int, int, np.random.Generator], FloatArray]  # (t, runs, rng) -> W_t


# --- references written here, apart from the module -------------------------------------


def simulate_run_lengths(
    h: float, sampler: Sampler, runs: int, seed: int, max_t: int = 10**6
) -> npt.NDArray[np.int64]:
    """Run lengths of ``runs`` charts S_t = max(0, S_{t-1} + W_t), signal at S_t >= h.

    Charts still running at ``max_t`` get run length ``max_t + 1`` (censored)."""
    rng = np.random.default_rng(seed)
    lengths = np.full(runs, max_t + 1, dtype=np.int64)
    s = np.zeros(runs)
    active = np.arange(runs)
    t = 0
    while active.size and t < max_t:
        t += 1
        s[active] = np.maximum(0.0, s[active] + sampler(t, active.size, rng))
        hit = s[active] >= h
        lengths[active[hit]] = t
        active = active[~hit]
    return lengths


def bernoulli_llr_sampler(n: int, p: float, p0: float, p1: float) -> Sampler:
    up, down = np.log(p1 / p0), np.log((1 - p1) / (1 - p0))

    def draw(t: int, size: int, rng: np.random.Generator) -> FloatArray:
        k = rng.binomial(n, p, size=size)
        return k * up + (n - k) * down

    return draw


def normal_step(mean: float, spacing: float = 0.002, span: float = 8.0) -> StepDistribution:
    """N(mean, 1) on a grid of bin centres ``mean + j*spacing``; each point carries its bin's
    probability, the tails beyond ``span`` go to the end points."""
    x = np.arange(-span, span + spacing / 2, spacing)
    edges = np.concatenate([[-np.inf], x[:-1] + spacing / 2, [np.inf]])
    return StepDistribution(x + mean, np.diff(norm.cdf(edges)))


def integral_equation_arl(h: float, mean: float, nodes: int = 64) -> float:
    """ARL of the one-sided CUSUM with N(mean, 1) increments from the integral equation
    L(x) = 1 + L(0) F(-x) + int_0^h L(y) f(y - x) dy, solved by Nystrom's method with
    Gauss-Legendre nodes (Goel & Wu 1971, Technometrics 13:221-230; Vance 1986, J Quality
    Technology 18:189-193)."""
    g, w = np.polynomial.legendre.leggauss(nodes)
    y = (g + 1.0) * h / 2.0
    w = w * h / 2.0
    x = np.concatenate([[0.0], y])
    kernel = np.empty((nodes + 1, nodes + 1))
    kernel[:, 0] = norm.cdf(-x, loc=mean)
    kernel[:, 1:] = norm.pdf(y[None, :] - x[:, None], loc=mean) * w[None, :]
    return float(np.linalg.solve(np.eye(nodes + 1) - kernel, np.ones(nodes + 1))[0])


def assert_cdf_matches(chain: FloatArray, lengths: npt.NDArray[np.int64], sigmas: float) -> None:
    t = np.arange(1, chain.size + 1)
    empirical = (lengths[:, None] <= t[None, :]).mean(axis=0)
    se = np.sqrt(np.maximum(chain * (1 - chain), 1e-12) / lengths.size)
    worst = float(np.max(np.abs(empirical - chain) / se))
    assert worst < sigmas, f"run-length CDF off by {worst:.2f} standard errors"


# --- increments ---------------------------------------------------------------------------


def test_binomial_llr_is_the_log_likelihood_ratio() -> None:
    # Definition (Reynolds & Stoumbos 1999): log of Binomial(n, p1) over Binomial(n, p0) pmf.
    for k, n, p0, p1 in [(0, 1, 0.1, 0.2), (1, 1, 0.1, 0.2), (7, 40, 0.15, 0.25), (3, 9, 0.5, 0.3)]:
        expected = binom.logpmf(k, n, p1) - binom.logpmf(k, n, p0)
        assert binomial_llr(k, n, p0, p1) == pytest.approx(expected, abs=1e-12)


def test_binomial_step_distribution_matches_scipy() -> None:
    step = binomial_step_distribution(30, 0.12, 0.1, 0.2)
    k = np.arange(31)
    # Relative 1e-12: the pmf is computed in logs (service.stats.distributions), which
    # rounds to about 1e-14; a wrong formula would be off by orders of magnitude more.
    assert step.probabilities == pytest.approx(binom.pmf(k, 30, 0.12), rel=1e-12, abs=1e-300)
    assert step.values == pytest.approx([binomial_llr(i, 30, 0.1, 0.2) for i in k], abs=1e-12)
    # In control the mean increment is minus n times the Kullback-Leibler divergence (common
    # practice: E_p0[log(f1/f0)] = -KL(f0 || f1)).
    step0 = binomial_step_distribution(30, 0.1, 0.1, 0.2)
    kl = 0.1 * np.log(0.1 / 0.2) + 0.9 * np.log(0.9 / 0.8)
    assert float(step0.values @ step0.probabilities) == pytest.approx(-30 * kl, rel=1e-12)


def test_risk_adjusted_llr_sums_the_per_case_terms() -> None:
    # Steiner et al. 2000: W_i = y_i ln R - ln(1 - p_i + R p_i), summed here case by case.
    rng = np.random.default_rng(3)
    p = rng.uniform(0.01, 0.6, size=50)
    y = (rng.random(50) < p).astype(float)
    for r in (0.5, 2.0):
        per_case = float(np.sum(y * np.log(r) - np.log(1 - p + r * p)))
        ours = risk_adjusted_llr(y.sum(), float(np.sum(np.log1p((r - 1) * p))), r)
        assert ours == pytest.approx(per_case, abs=1e-12)


def test_risk_adjusted_distribution_one_group_is_binomial() -> None:
    step = risk_adjusted_step_distribution(np.array([0.2]), np.array([25]), 2.0)
    k = np.arange(26)
    assert step.probabilities == pytest.approx(binom.pmf(k, 25, 0.2), abs=1e-12)
    assert step.values == pytest.approx(k * np.log(2.0) - 25 * np.log(1.2), abs=1e-12)


def test_risk_adjusted_distribution_matches_direct_convolution() -> None:
    risks = np.array([0.02, 0.1, 0.35, 0.7])
    counts = np.array([40, 25, 12, 3])
    r, r0 = 1.8, 1.3
    q = r0 * risks / (1 - risks + r0 * risks)
    pmf = np.ones(1)
    for qj, cj in zip(q, counts, strict=True):  # one Bernoulli case at a time
        for _ in range(cj):
            pmf = np.convolve(pmf, [1 - qj, qj])
    step = risk_adjusted_step_distribution(risks, counts, r, in_control_odds_ratio=r0)
    assert step.probabilities == pytest.approx(pmf, abs=1e-13)
    constant = float(np.sum(counts * np.log(1 - risks + r * risks)))
    assert step.values == pytest.approx(np.arange(81) * np.log(r) - constant, abs=1e-12)


def test_risk_adjusted_normal_approximation_above_the_exact_limit() -> None:
    risks = np.array([0.05, 0.1, 0.3, 0.5])
    counts = np.array([2000, 2000, 1000, EXACT_CASE_LIMIT - 4000 + 1])
    step = risk_adjusted_step_distribution(risks, counts, 1.5)
    # Exact reference: binomial pmfs (scipy) convolved with numpy.
    pmf = np.ones(1)
    for pj, cj in zip(risks, counts, strict=True):
        pmf = np.convolve(pmf, binom.pmf(np.arange(cj + 1), cj, pj))
    y = np.rint((step.values + np.sum(counts * np.log1p(0.5 * risks))) / np.log(1.5)).astype(int)
    approx_cdf = np.cumsum(step.probabilities)
    exact_cdf = np.cumsum(pmf)[y]
    assert step.values.size < counts.sum() / 2  # the window, not the whole support
    assert np.max(np.abs(approx_cdf - exact_cdf)) < 1e-4
    mean = float(step.values @ step.probabilities)
    exact_mean = float(np.sum(counts * risks)) * np.log(1.5) - np.sum(
        counts * np.log1p(0.5 * risks)
    )
    assert mean == pytest.approx(exact_mean, abs=1e-3)


# --- paths --------------------------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.floats(-5, 5, allow_nan=False), max_size=40),
    st.floats(0, 3, allow_nan=False),
)
def test_cusum_path_follows_the_recursion(increments: list[float], start: float) -> None:
    expected, s = [], start
    for w in increments:
        s = max(0.0, s + w)
        expected.append(s)
    assert cusum_path(increments, start) == pytest.approx(expected, abs=1e-9)


# --- the chain against simulation (Monte-Carlo standard errors, fixed seeds) ---------------

BINOMIAL_CHARTS = [
    # n, p0, p1, h, true rate, runs
    (1, 0.1, 0.2, 2.5, 0.1, 40_000),
    (1, 0.05, 0.1, 3.0, 0.05, 10_000),
    (20, 0.1, 0.2, 3.0, 0.1, 20_000),
    (50, 0.3, 0.4, 4.0, 0.3, 20_000),
    (20, 0.1, 0.2, 3.0, 0.15, 20_000),  # out of control
]


@pytest.mark.parametrize(("n", "p0", "p1", "h", "p", "runs"), BINOMIAL_CHARTS)
def test_binomial_chart_arl_matches_simulation(
    n: int, p0: float, p1: float, h: float, p: float, runs: int
) -> None:
    arl = average_run_length(h, binomial_step_distribution(n, p, p0, p1))
    lengths = simulate_run_lengths(h, bernoulli_llr_sampler(n, p, p0, p1), runs, seed=11)
    se = lengths.std() / np.sqrt(runs)
    assert abs(arl - lengths.mean()) < 4 * se, (arl, lengths.mean(), se)


def test_binomial_chart_run_length_cdf_matches_simulation_with_changing_sizes() -> None:
    sizes = [40, 55, 30, 70, 45, 60, 35, 50, 65, 40, 55, 45]
    steps = [binomial_step_distribution(n, 0.12, 0.1, 0.15) for n in sizes]
    chain = run_length_cdf(2.0, steps, horizon=24)

    def draw(t: int, size: int, rng: np.random.Generator) -> FloatArray:
        n = sizes[min(t - 1, len(sizes) - 1)]
        k = rng.binomial(n, 0.12, size=size)
        return k * np.log(1.5) + (n - k) * np.log(0.85 / 0.9)

    lengths = simulate_run_lengths(2.0, draw, 40_000, seed=5, max_t=24)
    assert_cdf_matches(chain, lengths, sigmas=4.0)


RISKS = np.array([0.03, 0.08, 0.2, 0.45])


def risk_adjusted_sampler(counts: list[npt.NDArray[np.int64]], r: float, r0: float) -> Sampler:
    q = r0 * RISKS / (1 - RISKS + r0 * RISKS)

    def draw(t: int, size: int, rng: np.random.Generator) -> FloatArray:
        c = counts[min(t - 1, len(counts) - 1)]
        events = rng.binomial(c[None, :], q[None, :], size=(size, RISKS.size)).sum(axis=1)
        return events * np.log(r) - np.sum(c * np.log(1 - RISKS + r * RISKS))

    return draw


@pytest.mark.parametrize("r0", [1.0, 2.0])
def test_risk_adjusted_chart_matches_simulation(r0: float) -> None:
    counts = [np.array([20, 30, 15, 5]), np.array([35, 20, 10, 10]), np.array([25, 25, 20, 8])]
    steps = [risk_adjusted_step_distribution(RISKS, c, 2.0, r0) for c in counts]
    sampler = risk_adjusted_sampler(counts, 2.0, r0)
    h = 3.5
    lengths = simulate_run_lengths(h, sampler, 20_000, seed=17, max_t=36)
    assert_cdf_matches(run_length_cdf(h, steps, horizon=36), lengths, sigmas=4.0)
    # ARL with one period's mix repeated.
    arl = average_run_length(h, steps[0])
    lengths = simulate_run_lengths(h, risk_adjusted_sampler(counts[:1], 2.0, r0), 20_000, 19)
    se = lengths.std() / np.sqrt(lengths.size)
    assert abs(arl - lengths.mean()) < 4 * se, (arl, lengths.mean(), se)


# --- the chain with normal increments ----------------------------------------------------

# One-sided CUSUM, k = 0.5, in control: ARL 336 at h = 4 and 930 at h = 5 (from memory: the
# standard ARL table for k = 1/2, e.g. Montgomery, Introduction to Statistical Quality
# Control, whose two-sided 168 and 465 are half these).
PUBLISHED_NORMAL_ARL = [(4.0, 336.0), (5.0, 930.0)]


@pytest.mark.parametrize(("h", "published"), PUBLISHED_NORMAL_ARL)
def test_normal_cusum_arl_against_table_and_integral_equation(h: float, published: float) -> None:
    step = normal_step(-0.5)  # X - k with X ~ N(0, 1), k = 0.5
    chain = average_run_length(h, step)
    reference = integral_equation_arl(h, -0.5)
    assert reference == pytest.approx(published, rel=3e-3)
    assert chain == pytest.approx(reference, rel=5e-4)
    # Out of control (mean shifted by one sigma): integral equation only.
    assert average_run_length(h, normal_step(0.5)) == pytest.approx(
        integral_equation_arl(h, 0.5), rel=5e-4
    )


@pytest.mark.parametrize(("h", "runs"), [(4.0, 20_000), (5.0, 8_000)])
def test_normal_cusum_arl_against_simulation(h: float, runs: int) -> None:
    def draw(t: int, size: int, rng: np.random.Generator) -> FloatArray:
        return rng.standard_normal(size) - 0.5

    lengths = simulate_run_lengths(h, draw, runs, seed=23)
    se = lengths.std() / np.sqrt(runs)
    assert abs(average_run_length(h, normal_step(-0.5)) - lengths.mean()) < 4 * se


def test_normal_run_length_cdf_against_simulation() -> None:
    def draw(t: int, size: int, rng: np.random.Generator) -> FloatArray:
        return rng.standard_normal(size) + 0.5  # shifted by one sigma: 1 - k = 0.5

    lengths = simulate_run_lengths(4.0, draw, 40_000, seed=29, max_t=30)
    assert_cdf_matches(run_length_cdf(4.0, [normal_step(0.5)], horizon=30), lengths, 4.0)


# --- convergence in the number of states --------------------------------------------------


def test_normal_chain_converges_in_states() -> None:
    step = normal_step(-0.5)
    reference = integral_equation_arl(4.0, -0.5)
    errors = [abs(average_run_length(4.0, step, m) / reference - 1) for m in (50, 100, 200, 400)]
    assert errors == sorted(errors, reverse=True)
    assert errors[2] < 5e-4  # 200 states


def test_bernoulli_chain_converges_in_states() -> None:
    step = binomial_step_distribution(1, 0.1, 0.1, 0.2)
    fine_arl = average_run_length(2.5, step, 1600)
    fine_cdf = run_length_cdf(2.5, [step], 24, 1600)
    gaps = [abs(average_run_length(2.5, step, m) / fine_arl - 1) for m in (50, 200, 800)]
    assert gaps[1] < 0.01 and gaps[2] < 0.003
    assert np.max(np.abs(run_length_cdf(2.5, [step], 24, 200) - fine_cdf)) < 2e-3


# --- control limits ---------------------------------------------------------------------


def test_control_limit_is_the_smallest_meeting_the_bound() -> None:
    sizes = [400, 450, 500, 520, 480, 430, 610, 390, 505, 470, 455, 500]
    steps = [binomial_step_distribution(n, 0.2, 0.2, 0.25) for n in sizes]
    h = control_limit(steps, 12, 0.05)
    assert run_length_cdf(h, steps, 12)[-1] <= 0.05
    assert run_length_cdf(h * (1 - 2 * CONTROL_LIMIT_PRECISION), steps, 12)[-1] > 0.05

    def draw(t: int, size: int, rng: np.random.Generator) -> FloatArray:
        n = sizes[t - 1]
        k = rng.binomial(n, 0.2, size=size)
        return k * np.log(1.25) + (n - k) * np.log(0.75 / 0.8)

    lengths = simulate_run_lengths(h, draw, 40_000, seed=31, max_t=12)
    false_alarms = float(np.mean(lengths <= 12))
    assert abs(false_alarms - 0.05) < 4 * np.sqrt(0.05 * 0.95 / 40_000)


def test_control_limit_grows_with_the_horizon_and_shrinks_with_the_rate() -> None:
    step = binomial_step_distribution(100, 0.1, 0.1, 0.15)
    assert control_limit([step], 24, 0.05) > control_limit([step], 12, 0.05)
    assert control_limit([step], 12, 0.01) > control_limit([step], 12, 0.05)


# --- bad input ----------------------------------------------------------------------------


def test_bad_input_is_refused() -> None:
    with pytest.raises(ValueError):
        StepDistribution(np.array([0.0, 1.0]), np.array([0.5, 0.6]))
    with pytest.raises(ValueError):
        binomial_llr(3, 2, 0.1, 0.2)
    with pytest.raises(ValueError):
        binomial_step_distribution(10, 0.1, 0.0, 0.2)
    with pytest.raises(ValueError):
        risk_adjusted_step_distribution(np.array([0.1, 1.2]), np.array([3, 4]), 2.0)
    with pytest.raises(ValueError):
        risk_adjusted_step_distribution(np.array([0.1]), np.array([3]), 0.0)
    with pytest.raises(ValueError):
        cusum_path([1.0], start=-1.0)
    never = StepDistribution(np.array([-1.0, 0.0]), np.array([0.5, 0.5]))
    with pytest.raises(ValueError):
        average_run_length(2.0, never)
    with pytest.raises(ValueError):
        control_limit([never], 12, 0.05)
    with pytest.raises(ValueError):
        run_length_cdf(0.0, [never], 12)


def test_coarsening_keeps_the_mean_and_the_false_alarm_bound() -> None:
    # A month of 20,000 cases: 20,001 support values, of which those with probability above
    # 1e-15 are put on 401 points. The mean of what is kept is exact, the variance grows by
    # at most a quarter spacing squared, and the limit found on the coarse distribution still
    # meets the false-alarm bound when the full distribution runs through the same chain.
    step = binomial_step_distribution(20_000, 0.6, 0.6, 0.62)
    small = coarsened(step, 401)
    assert small.values.size == 401
    kept = step.probabilities >= 1e-15
    w = step.probabilities[kept] / step.probabilities[kept].sum()
    mean = float(step.values[kept] @ w)
    assert float(small.values @ small.probabilities) == pytest.approx(mean, rel=1e-9)
    var = float((step.values[kept] - mean) ** 2 @ w)
    spacing = float(small.values[1] - small.values[0])
    small_var = float((small.values - mean) ** 2 @ small.probabilities)
    assert var * (1 - 1e-9) <= small_var <= var + spacing**2 / 4 + 1e-12
    for n, p0, p1 in ((20_000, 0.6, 0.62), (900, 0.75, 0.8)):
        full = binomial_step_distribution(n, p0, p0, p1)
        h = control_limit([coarsened(full, 401)], 12, 0.01, 100)
        assert run_length_cdf(h, [full], 12, 100)[-1] <= 0.01 * 1.02
        assert h == pytest.approx(control_limit([full], 12, 0.01, 100), rel=0.15)
    assert coarsened(binomial_step_distribution(30, 0.5, 0.5, 0.6), 401).values.size == 31


def test_mixture_draws_a_component_then_an_increment() -> None:
    a = binomial_step_distribution(20, 0.3, 0.3, 0.4)
    b = binomial_step_distribution(30, 0.5, 0.5, 0.6)
    m = mixture([a, b], [1.0, 3.0])
    mean = 0.25 * float(a.values @ a.probabilities) + 0.75 * float(b.values @ b.probabilities)
    assert float(m.values @ m.probabilities) == pytest.approx(mean, rel=1e-12)
    assert m.probabilities.sum() == pytest.approx(1.0)
    # The chain of the mixture equals a simulation that draws the component each period.
    h = 2.0
    rng_choice = [a, b]

    def draw(t: int, size: int, rng: np.random.Generator) -> FloatArray:
        pick = rng.random(size) < 0.75
        out = np.empty(size)
        for flag, dist in ((False, rng_choice[0]), (True, rng_choice[1])):
            idx = np.flatnonzero(pick == flag)
            out[idx] = rng.choice(dist.values, size=idx.size, p=dist.probabilities)
        return out

    lengths = simulate_run_lengths(h, draw, runs=20_000, seed=3, max_t=12)
    simulated = float(np.mean(lengths <= 12))
    chained = float(run_length_cdf(h, [m], 12, 200)[-1])
    assert chained == pytest.approx(
        simulated, abs=4 * np.sqrt(simulated * (1 - simulated) / 20_000) + 0.005
    )
    with pytest.raises(ValueError):
        mixture([a], [0.0])
