"""Charts across months: they stay quiet for a policy at the edge of its promise and signal
on a sustained gap beyond it; the limits are those of the Brook & Evans chain."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import binom

from service.audit.charts import limit_for
from service.audit.monitoring import DESIGN_HORIZON, WINDOW, MonthCounts, version_monitors
from service.audit.month import Month
from service.audit.realized import CellCounts
from service.audit.verdicts import CheckKind
from service.audit.version_settings import resolve_settings
from service.stats.cusum import (
    StepDistribution,
    binomial_step_distribution,
    coarsened,
    cusum_path,
    run_length_cdf,
)
from tests.test_verdicts import EPS, document

START = Month.parse("2025-01")


def history(
    months: int, tpr_b: float, seed: int, n_a: int = 3000, n_b: int = 400
) -> list[MonthCounts]:
    """Months of a version in which a's TPR is 0.7 and b's is ``tpr_b`` (prevalence 0.2)."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(months):
        cells = {}
        for g, n, tpr in (("a", n_a, 0.7), ("b", n_b, tpr_b)):
            pos = int(rng.binomial(n, 0.2))
            tp = int(rng.binomial(pos, tpr))
            fp = int(rng.binomial(n - pos, 0.2))
            cells[g] = CellCounts(n=n, actions=tp + fp, observed=n, positives=pos, tp=tp, fp=fp)
        out.append(MonthCounts(START.shifted(i), True, cells))
    return out


def monitors(hist: list[MonthCounts], level: float = 0.05):
    doc = document()
    settings = resolve_settings(doc, hist[-1].cells, None, None)
    return version_monitors(1, doc, settings, hist, level)


def test_a_sustained_gap_of_twice_the_tolerance_signals_above_or_below() -> None:
    (m,) = monitors(history(18, 0.7 - 2 * EPS, seed=1))
    assert (m.kind, m.metric, m.group, m.against) == (CheckKind.PARITY, "tpr", "b", "a")
    below = next(s for s in m.sides if s.side == "below")
    assert below.signal and below.first_signal is not None
    assert below.path[-1] >= below.limit
    assert m.pooled is not None and m.pooled.estimate == pytest.approx(-0.1, abs=0.03)


def test_each_limit_meets_its_share_of_the_level_with_the_references_spread() -> None:
    hist = history(6, 0.7, seed=2)
    (m,) = monitors(hist, level=0.05)
    n = round(np.mean([x.cells["b"].positives for x in hist]))
    n_ref = round(np.mean([x.cells["a"].positives for x in hist]))
    r = sum(x.cells["a"].tp for x in hist) / sum(x.cells["a"].positives for x in hist)
    for side in m.sides:
        # Recomputed independently: the group's count is Binomial(n, r + edge), the base is
        # the reference's Binomial(n_ref, r) / n_ref; the exact joint distribution of one
        # month's increment (every pair of counts), through a fine chain (200 states).
        kb = np.arange(n + 1)
        ka = np.arange(n_ref + 1)
        pa = binom.pmf(ka, n_ref, r)
        values, weights = [], []
        for a, wa in zip(ka, pa, strict=True):
            if wa < 1e-12:
                continue
            base = a / n_ref
            p0 = min(1 - 1e-4, max(1e-4, base + side.in_control))
            p1 = min(1 - 1e-4, max(1e-4, base + side.out_of_control))
            truth = min(1 - 1e-4, max(1e-4, r + side.in_control))
            values.append(kb * np.log(p1 / p0) + (n - kb) * np.log((1 - p1) / (1 - p0)))
            weights.append(wa * binom.pmf(kb, n, truth))
        step = StepDistribution(np.concatenate(values), np.concatenate(weights) / np.sum(weights))
        alarm = run_length_cdf(side.limit, [coarsened(step, 401)], DESIGN_HORIZON, 200)[-1]
        assert alarm <= 0.05 / 2  # each of the pair's two charts: half the level


@pytest.mark.slow
@pytest.mark.parametrize("n_a", [3000, 400])
def test_in_control_at_the_edge_the_charts_signal_at_most_as_designed(n_a: int) -> None:
    # 300 simulated years at a gap of exactly the tolerance: false signals within 12 months
    # must stay at or below the designed 5% for the pair of charts, also when the reference
    # group is no larger than the charted one (its realized rate is the charts' base).
    years = 300
    signals = sum(
        monitors(history(12, 0.7 + EPS, seed=s, n_a=n_a, n_b=400))[0].signal for s in range(years)
    )
    # 5% designed; 8.4% is the top of the binomial 99% range at 300 years.
    assert signals / years <= 0.084


def test_a_limit_over_the_window_and_a_year_bounds_every_year_of_audits() -> None:
    # One chart with i.i.d. in-control months: 30 cases a month at p0 = 0.3 against p1 = 0.4
    # (an increment with positive and negative values, like a gap chart's), its limit as the
    # charts design it. 20,000 simulated versions of 36 months; the audit of month t shows
    # the chart recomputed from zero over the latest WINDOW months. Checked against the Markov
    # chain of Brook & Evans (1972, Biometrika 59:539-549) with 200 states: the first year's
    # audits see a chart from zero, so they signal in P(run length <= 12) of versions; the
    # third year's windows lie within months 2-36, and a windowed statistic at or above h is
    # a run of months summing to h (Lindley 1952), so they signal in at most P(run length <=
    # 36) of versions, itself within the chart's share of the level.
    step = binomial_step_distribution(30, 0.3, 0.3, 0.4)
    share = 0.05
    h = limit_for(step, share)
    cdf = run_length_cdf(h, [step], DESIGN_HORIZON, 200)
    assert cdf[-1] <= share
    rng = np.random.default_rng(11)
    versions = 20_000
    steps = rng.choice(step.values, p=step.probabilities, size=(versions, DESIGN_HORIZON))

    def shown(t: int) -> np.ndarray:  # the audit of month t's statistic, per version
        window = steps[:, max(0, t - WINDOW) : t]
        x = np.cumsum(window, axis=1)
        floor = np.minimum(np.minimum.accumulate(x, axis=1), 0.0)
        return x[:, -1] - floor[:, -1]

    assert shown(30)[0] == pytest.approx(cusum_path(list(steps[0, 6:30]))[-1])
    first = np.any([shown(t) >= h for t in range(1, 13)], axis=0).mean()
    third = np.any([shown(t) >= h for t in range(25, 37)], axis=0).mean()
    x = np.cumsum(steps, axis=1)  # the chart from zero over all 36 months, no window
    plain = np.any(x - np.minimum(np.minimum.accumulate(x, axis=1), 0.0) >= h, axis=1).mean()
    se = np.sqrt(share * (1 - share) / versions)
    assert first == pytest.approx(cdf[11], abs=3 * se)
    assert third <= cdf[-1] + 3 * se
    assert plain == pytest.approx(cdf[-1], abs=3 * se)
    assert third > 1.5 * first  # a chart that has run a year signals more often than from 0


def test_immature_months_are_left_out_of_outcome_charts() -> None:
    hist = history(5, 0.6, seed=3)
    hist[-1] = MonthCounts(hist[-1].month, False, hist[-1].cells)
    (m,) = monitors(hist)
    assert str(hist[-1].month) not in m.months and len(m.months) == 4
