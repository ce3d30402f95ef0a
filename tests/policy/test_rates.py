"""Expected confusion counts, checked against scikit-learn and Chouldechova's identity."""

import numpy as np
import pytest
from sklearn.metrics import confusion_matrix

from service.policy.rates import chouldechova_fpr, expected_counts, expected_counts_by_group


def _data(seed: int, n: int = 2000) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.3).astype(np.int8)
    p = rng.random(n)
    groups = rng.integers(0, 3, size=n)
    return p, y, groups


def test_deterministic_rule_matches_sklearn_confusion_matrix() -> None:
    # Reference: scikit-learn confusion_matrix (Pedregosa et al. 2011, JMLR 12:2825-2830).
    p, y, groups = _data(1)
    acts = (p >= 0.6).astype(np.float64)  # a plain cut: probabilities 0 or 1
    counts = expected_counts_by_group(acts, y, groups, 3)
    for g in range(3):
        rows = groups == g
        tn, fp, fn, tp = confusion_matrix(y[rows], acts[rows].astype(int), labels=[0, 1]).ravel()
        assert (counts.tp[g], counts.fp[g], counts.fn[g], counts.tn[g]) == (tp, fp, fn, tn)


def test_randomized_rule_counts_are_sums_of_probabilities() -> None:
    # Common practice: expected counts are sums of P(action | s_i); compared
    # with sklearn's confusion_matrix weighted by the probability of each cell.
    p, y, _ = _data(2)
    counts = expected_counts(p, y)
    pred = np.concatenate([np.ones_like(y), np.zeros_like(y)])
    weights = np.concatenate([p, 1.0 - p])
    tn, fp, fn, tp = confusion_matrix(
        np.concatenate([y, y]), pred, labels=[0, 1], sample_weight=weights
    ).ravel()
    assert counts.tp[0] == pytest.approx(tp, rel=1e-12)
    assert counts.fp[0] == pytest.approx(fp, rel=1e-12)
    assert counts.fn[0] == pytest.approx(fn, rel=1e-12)
    assert counts.tn[0] == pytest.approx(tn, rel=1e-12)


def test_rates_and_cost() -> None:
    p, y, _ = _data(3)
    c = expected_counts(p, y)
    pos, neg = y == 1, y == 0
    assert c.tpr[0] == pytest.approx(p[pos].mean(), rel=1e-12)
    assert c.fpr[0] == pytest.approx(p[neg].mean(), rel=1e-12)
    assert c.fnr[0] + c.tpr[0] == pytest.approx(1.0)
    assert c.tnr[0] + c.fpr[0] == pytest.approx(1.0)
    assert c.action_rate[0] == pytest.approx(p.mean(), rel=1e-12)
    assert c.ppv[0] == pytest.approx(p[pos].sum() / p.sum(), rel=1e-12)
    assert c.npv[0] == pytest.approx((1 - p[neg]).sum() / (1 - p).sum(), rel=1e-12)
    assert c.prevalence[0] == pytest.approx(y.mean())
    cost = (1.0 * p[neg].sum() + 4.0 * (1 - p[pos]).sum()) / len(y)
    assert c.cost_per_case(1.0, 4.0)[0] == pytest.approx(cost, rel=1e-12)


def test_undefined_rates_are_nan_not_zero() -> None:
    c = expected_counts(np.zeros(4), np.array([0, 0, 1, 1]))
    assert np.isnan(c.ppv[0])
    assert c.tpr[0] == 0.0


def test_chouldechova_worked_example() -> None:
    # Chouldechova 2017, "Fair prediction with disparate impact", Big Data 5(2):153-163,
    # eq. (2.6): FPR = p/(1-p) (1-PPV)/PPV (1-FNR); p = 0.4, PPV = 0.6, FNR = 0.3 gives
    # (2/3)(2/3)(0.7) = 0.31111 by hand.
    assert chouldechova_fpr(0.4, 0.6, 0.3) == pytest.approx(0.311111, abs=1e-6)


def test_rates_module_satisfies_chouldechova_identity() -> None:
    # The identity FPR = p/(1-p) (1-PPV)/PPV (1-FNR) holds for any counts (Chouldechova
    # 2017); our rates must satisfy it group by group, randomized rules included.
    p, y, groups = _data(4)
    c = expected_counts_by_group(p, y, groups, 3)
    for g in range(3):
        implied = chouldechova_fpr(c.prevalence[g], c.ppv[g], c.fnr[g])
        assert implied == pytest.approx(c.fpr[g], rel=1e-12)


def test_rejects_probabilities_outside_unit_interval() -> None:
    with pytest.raises(ValueError, match="probabilities"):
        expected_counts(np.array([0.5, 1.5]), np.array([0, 1]))


def test_wilson_for_expected_rates_matches_statsmodels() -> None:
    # Reference: statsmodels proportion_confint(method="wilson") (Seabold & Perktold 2010),
    # which accepts a non-integer count: the derive report applies Wilson (1927) to expected
    # (cross-fitted) rates.
    from statsmodels.stats.proportion import proportion_confint

    from service.stats.proportions import wilson_interval_for_rate

    for count, nobs in [(81.0, 263), (37.25, 148), (0.0, 20), (19.5, 20), (3.3, 7)]:
        ours = wilson_interval_for_rate(count / nobs, nobs)
        ref = proportion_confint(count, nobs, alpha=0.05, method="wilson")
        assert ours == pytest.approx(ref, abs=1e-12)
    # Newcombe 1998, "Two-sided confidence intervals for the single proportion", Statistics
    # in Medicine 17:857-872, Table I, Wilson score method: 81/263 -> 0.2553-0.3662 (from
    # memory; statsmodels agrees above).
    assert wilson_interval_for_rate(81 / 263, 263) == pytest.approx((0.2553, 0.3662), abs=5e-5)
