"""Defects found in derive, each with the case that showed it."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.policy.derive import (
    CalibrationData,
    DeriveSettings,
    LpPoint,
    prepare,
    rule_for_point,
    solve,
)
from service.policy.document import Criterion
from service.policy.rates import expected_counts
from service.policy.roc import hull_of, roc_curve
from service.policy.rules import rule_probabilities


def _one_valued_data() -> CalibrationData:
    """Invented: group 'b' has the score 0.5 on every row, group 'a' an informative score."""
    rng = np.random.default_rng(1)
    n = 2000
    g = rng.integers(0, 2, n)
    y = (rng.random(n) < 0.3).astype(np.int8)
    s = np.where(g == 1, 0.5, np.clip(0.3 * y + rng.random(n) * 0.7, 0, 1))
    return CalibrationData(s, y, g.astype(np.intp), ["a", "b"], ["g"])


@pytest.mark.parametrize("criterion", list(Criterion))
def test_a_group_with_one_score_value_derives(criterion: Criterion) -> None:
    # Its ROC hull is the chance diagonal from never (0, 0) to always (1, 1): every point on
    # it is "act with probability p at every score", and p must equal the LP's FPR = TPR.
    data = _one_valued_data()
    sol = solve(prepare(data, DeriveSettings(1.0, 4.0)), criterion, 0.0)
    b = next(r for r in sol.groups if r.key == "b")
    assert float(b.counts.tpr[0]) == pytest.approx(float(b.counts.fpr[0]), abs=1e-12)
    if criterion is not Criterion.SINGLE_CUT:
        rule = sol.rules["b"]
        p = rule_probabilities(rule, np.array([0.5]))[0]
        assert p == pytest.approx(sol.points["b"].tpr, abs=1e-9)


@st.composite
def _hull_and_point(draw: st.DrawFn) -> tuple[np.ndarray, np.ndarray, LpPoint]:
    n = draw(st.integers(2, 60))
    distinct = draw(st.integers(1, 6))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 2, n).astype(np.int8)
    y[:2] = [0, 1]
    s = rng.integers(0, distinct, n) / 10.0
    curve = roc_curve(s, y)
    hull = hull_of(curve, 0.0)
    f = draw(st.floats(0.0, 1.0))
    lam = draw(st.floats(0.0, 1.0))
    d = draw(st.floats(0.0, 1.0))
    t = float(np.interp(f, hull.fpr, hull.tpr))
    point = LpPoint(lam * f + (1 - lam) * d, lam * t + (1 - lam) * d)
    return s, y, point


@settings(max_examples=300, deadline=None)
@given(_hull_and_point())
def test_every_point_between_hull_and_diagonal_becomes_a_rule_with_its_rates(
    case: tuple[np.ndarray, np.ndarray, LpPoint],
) -> None:
    # Hardt, Price & Srebro 2016 ("Equality of Opportunity in Supervised Learning", NeurIPS,
    # section 4): randomizing between cuts reaches every point between the ROC's hull and the
    # chance diagonal. Few distinct scores give hulls with segments of slope 1 (the diagonal
    # itself when there is one value).
    s, y, point = case
    hull = hull_of(roc_curve(s, y), 0.0)
    rule = rule_for_point(hull, point, 0.0)
    counts = expected_counts(rule_probabilities(rule, s), y)
    assert float(counts.fpr[0]) == pytest.approx(point.fpr, abs=1e-9)
    assert float(counts.tpr[0]) == pytest.approx(point.tpr, abs=1e-9)
