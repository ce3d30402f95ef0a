"""Charts across months: they stay quiet for a policy at the edge of its promise and signal
on a sustained gap beyond it; the limits are those of the Brook & Evans chain."""

from __future__ import annotations

import numpy as np
import pytest

from service.audit.monitoring import HORIZON, STATES, MonthCounts, version_monitors
from service.audit.month import Month
from service.audit.realized import CellCounts
from service.audit.verdicts import CheckKind, resolve_settings
from service.stats.cusum import binomial_step_distribution, run_length_cdf
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


def test_each_limit_meets_the_bonferroni_share_of_the_level_in_a_year() -> None:
    hist = history(6, 0.7, seed=2)
    (m,) = monitors(hist, level=0.05)
    for side in m.sides:
        # Recompute the design: the group's mean monthly positives, the reference's mean TPR
        # shifted to the edge of the band, a false signal within 12 months at most 0.05 / 2.
        n = round(np.mean([x.cells["b"].positives for x in hist]))
        r = sum(x.cells["a"].tp for x in hist) / sum(x.cells["a"].positives for x in hist)
        p0, p1 = r + side.in_control, r + side.out_of_control
        step = binomial_step_distribution(n, p0, p0, p1)
        alarm = run_length_cdf(side.limit, [step], HORIZON, STATES)[-1]
        assert alarm <= 0.05 / 2 + 1e-12
        slightly_lower = run_length_cdf(side.limit * 0.99, [step], HORIZON, STATES)[-1]
        assert slightly_lower > alarm or side.limit < 1e-3


def test_in_control_at_the_edge_the_charts_signal_rarely() -> None:
    # 200 simulated years at a gap of exactly the tolerance: false signals within 12 months
    # must stay near or below the designed 5% for the pair of charts.
    signals = sum(monitors(history(12, 0.7 + EPS, seed=s))[0].signal for s in range(200))
    assert signals / 200 <= 0.10  # 5% designed; the binomial 95% range at n = 200 reaches 8.5%


def test_immature_months_are_left_out_of_outcome_charts() -> None:
    hist = history(5, 0.6, seed=3)
    hist[-1] = MonthCounts(hist[-1].month, False, hist[-1].cells)
    (m,) = monitors(hist)
    assert str(hist[-1].month) not in m.months and len(m.months) == 4
