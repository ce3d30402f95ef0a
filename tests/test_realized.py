"""Realized rates from counts, checked against scikit-learn and statsmodels on the same rows."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import confusion_matrix, precision_score, recall_score
from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint

from service.audit.realized import (
    CellCounts,
    cost_per_case,
    four_fifths_flag,
    gap,
    identifiable,
    rates,
)


def counts_from_rows(
    act: np.ndarray, observed: np.ndarray, y: np.ndarray, p: np.ndarray | None = None
) -> CellCounts:
    """A direct, row-by-row tally (the audit job does the same in SQL)."""
    obs = observed.astype(bool)
    p = act.astype(float) if p is None else p
    return CellCounts(
        n=len(act),
        actions=int(act.sum()),
        observed=int(obs.sum()),
        positives=int(y[obs].sum()),
        tp=int((act[obs] & y[obs]).sum()),
        fp=int((act[obs] & (1 - y[obs])).sum()),
        expected_fp=float(p[obs & (y == 0)].sum()),
        expected_fn=float((1 - p[obs & (y == 1)]).sum()),
    )


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_rates_match_scikit_learn_on_the_same_rows(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = 2_000
    y = (rng.random(n) < 0.3).astype(int)
    act = (rng.random(n) < np.where(y == 1, 0.7, 0.2)).astype(int)
    observed = (rng.random(n) < 0.85).astype(int)
    c = counts_from_rows(act, observed, y)
    r = rates(c, "action", "both")
    obs = observed == 1
    # scikit-learn (Pedregosa et al. 2011, JMLR 12:2825-2830): confusion_matrix, recall, precision.
    tn, fp, fn, tp = confusion_matrix(y[obs], act[obs], labels=[0, 1]).ravel()
    assert (c.tp, c.fp, c.fn, c.tn) == (tp, fp, fn, tn)
    assert r["tpr"].value == pytest.approx(recall_score(y[obs], act[obs]), abs=1e-15)
    assert r["fnr"].value == pytest.approx(1 - recall_score(y[obs], act[obs]), abs=1e-15)
    assert r["fpr"].value == pytest.approx(1 - recall_score(1 - y[obs], 1 - act[obs]), abs=1e-15)
    assert r["ppv"].value == pytest.approx(precision_score(y[obs], act[obs]), abs=1e-15)
    assert r["npv"].value == pytest.approx(precision_score(1 - y[obs], 1 - act[obs]), abs=1e-15)
    assert r["action_rate"].value == act.mean()
    assert r["coverage"].value == obs.mean()
    assert r["prevalence"].value == pytest.approx(y[obs].mean(), abs=1e-15)
    # Wilson intervals vs statsmodels proportion_confint(method="wilson") (Seabold & Perktold 2010).
    for metric, rate in r.items():
        if rate.value is None:
            continue
        lo, hi = proportion_confint(rate.numerator, rate.denominator, method="wilson")
        assert (rate.low, rate.high) == pytest.approx((lo, hi), abs=1e-12), metric


def test_gap_interval_matches_statsmodels_newcombe() -> None:
    a = CellCounts(n=400, actions=120)
    b = CellCounts(n=250, actions=100)
    ra, rb = rates(a, "action", "both"), rates(b, "action", "both")
    g = gap(ra["action_rate"], rb["action_rate"])
    # statsmodels confint_proportions_2indep(method="newcomb"): Newcombe 1998, method 10.
    lo, hi = confint_proportions_2indep(120, 400, 100, 250, method="newcomb", compare="diff")
    assert g.value == pytest.approx(0.3 - 0.4)
    assert (g.low, g.high) == pytest.approx((lo, hi), abs=1e-12)


def test_four_fifths_uniform_guidelines_example() -> None:
    # Uniform Guidelines Questions and Answers (1979), Q&A 12 (secondary): whites 48 of 80
    # hired (60%), Blacks 12 of 40 (30%): ratio 0.50, adverse impact.
    assert four_fifths_flag(12, 40, 48, 80)
    assert not four_fifths_flag(48, 80, 48, 80)


@pytest.mark.parametrize(
    ("selected", "flagged"),
    # 29 CFR 1607.4(D) and the Q&A (secondary): against 60%, rates of 45% / 48% / 51% give
    # ratios 0.75 (flagged), 0.80 (not flagged: strictly less is required) and 0.85.
    [(45, True), (48, False), (51, False)],
)
def test_four_fifths_boundary_is_strict(selected: int, flagged: bool) -> None:
    assert four_fifths_flag(selected, 100, 60, 100) is flagged


def test_four_fifths_exact_arithmetic_where_floats_fail() -> None:
    # IEEE 754 doubles (common practice): (16/25)/(20/25) is 0.7999999999999999, yet exactly
    # 0.8; the rule (29 CFR 1607.4(D), 1978) is about the exact ratio. (No assert on the
    # float division itself: comparing two literals checks nothing of ours.)
    assert not four_fifths_flag(16, 25, 20, 25)
    assert four_fifths_flag(15, 25, 20, 25)


def test_chouldechova_identity_holds_on_realized_rates() -> None:
    # Chouldechova 2017 (Big Data 5(2):153-163): FPR = p/(1-p) (1-PPV)/PPV (1-FNR); the
    # check value p = 0.4, PPV = 0.6, FNR = 0.3 gives FPR = 0.31111.
    c = CellCounts(n=3000, actions=1400, observed=3000, positives=1200, tp=840, fp=560)
    r = rates(c, "action", "both")
    p, ppv, fnr = r["prevalence"].value, r["ppv"].value, r["fnr"].value
    assert (p, ppv, fnr) == pytest.approx((0.4, 0.6, 0.3))
    assert r["fpr"].value == pytest.approx(0.31111, abs=5e-6)
    assert r["fpr"].value == pytest.approx(p / (1 - p) * (1 - ppv) / ppv * (1 - fnr))


def test_selective_labels_mark_rates_not_identifiable() -> None:
    c = CellCounts(n=100, actions=40, observed=40, positives=12, tp=12, fp=28)
    after_action = rates(c, "action", "action")
    for metric in ("prevalence", "tpr", "fpr", "fnr", "npv"):
        assert after_action[metric].missing == "not-identifiable"
        assert after_action[metric].value is None
    assert after_action["ppv"].value == pytest.approx(0.3)
    assert after_action["action_rate"].value == pytest.approx(0.4)
    assert identifiable("npv", "no-action") and not identifiable("ppv", "no-action")
    assert cost_per_case(c, 1, 4, 0.5, "action").realized is None


def test_no_cases_is_not_a_number() -> None:
    r = rates(CellCounts(n=5, actions=0), "action", "both")
    assert r["tpr"].missing == "no-cases" and r["tpr"].value is None
    assert r["favourable_rate"].value == 0.0
    assert rates(CellCounts(n=5, actions=0), "no-action", "both")["favourable_rate"].value == 1.0


def test_costs_realized_and_expected() -> None:
    rng = np.random.default_rng(7)
    n = 500
    y = (rng.random(n) < 0.25).astype(int)
    p = np.clip(rng.random(n), 0, 1)
    act = (rng.random(n) < p).astype(int)
    observed = np.ones(n, dtype=int)
    c = counts_from_rows(act, observed, y, p)
    cost = cost_per_case(c, 1.0, 4.0, 0.6, "both")
    # Common practice: cost per case (c_FP FP + c_FN FN) / N, and the same in expectation.
    fp = ((act == 1) & (y == 0)).sum()
    fn = ((act == 0) & (y == 1)).sum()
    assert cost.realized == pytest.approx((fp + 4 * fn) / n)
    assert cost.expected == pytest.approx((p[y == 0].sum() + 4 * (1 - p[y == 1]).sum()) / n)
    assert cost.promised == 0.6


def test_inconsistent_counts_are_refused() -> None:
    with pytest.raises(ValueError, match="tp <= positives"):
        CellCounts(n=10, actions=5, observed=10, positives=2, tp=3)
