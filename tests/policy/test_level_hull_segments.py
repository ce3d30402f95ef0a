"""ROC hulls with a segment of slope 1 (a level stretch of TPR - FPR): rules for points on it.

The defect these pin down: the mixture code found the ends of the level segment by comparing
floats ``tpr - fpr``, which at the two ends can differ by one unit in the last place. One end
then looked like the only maximum, every point along the segment became that end's band, and
the derive engine's own check stopped with "the rule ... misses the LP point" (first seen in
cross-fitting on a demo sample, 20,000 rows, seed 20261579).
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.policy.derive import solve
from service.policy.mixture import LpPoint, rule_for_point
from service.policy.rates import expected_counts
from service.policy.roc import hull_of, roc_curve
from service.policy.rules import rule_probabilities
from service.policy.targets import Criterion
from service.policy.units import CalibrationData, DeriveSettings, prepare


def _three_scores(
    top: tuple[int, int], middle: tuple[int, int], bottom: tuple[int, int]
) -> tuple[np.ndarray, np.ndarray]:
    """Invented rows at scores 0.9, 0.5, 0.1; each pair is (positives, negatives)."""
    scores: list[float] = []
    outcomes: list[int] = []
    for score, (pos, neg) in zip((0.9, 0.5, 0.1), (top, middle, bottom), strict=True):
        scores += [score] * (pos + neg)
        outcomes += [1] * pos + [0] * neg
    return np.array(scores), np.array(outcomes, dtype=np.int8)


def _rates_of_rule(s: np.ndarray, y: np.ndarray, point: LpPoint) -> tuple[float, float]:
    rule = rule_for_point(hull_of(roc_curve(s, y), 0.0), point, 0.0)
    counts = expected_counts(rule_probabilities(rule, s), y)
    return float(counts.fpr[0]), float(counts.tpr[0])


def test_the_middle_of_a_level_segment_is_a_mixture_of_its_two_ends() -> None:
    # 3 positives, 6 negatives. Hull vertices (FPR, TPR), by hand: (0, 0), (1/6, 1/3) at
    # cut 0.9, (1/2, 2/3) at cut 0.5, (1, 1); the middle segment has slope (1/3)/(1/3) = 1.
    s, y = _three_scores((1, 1), (1, 2), (1, 3))
    hull = hull_of(roc_curve(s, y), 0.0)
    # The trap, asserted because the test rests on it: in IEEE 754 doubles 1/3 - 1/6 and
    # 2/3 - 1/2 do not round to the same value.
    assert hull.tpr[1] - hull.fpr[1] != hull.tpr[2] - hull.fpr[2]
    assert hull.gain[1] == hull.gain[2] == pytest.approx(1 / 6, abs=1e-15)
    # Half way along it (what the LP reports for weights 1/2, 1/2): by hand (1/3, 1/2),
    # reached by acting at 0.9 and with probability 1/2 at 0.5.
    point = LpPoint(0.5 * hull.fpr[1] + 0.5 * hull.fpr[2], 0.5 * hull.tpr[1] + 0.5 * hull.tpr[2])
    rule = rule_for_point(hull, point, 0.0)
    assert [step.start for step in rule.steps] == [0.5, 0.9]
    assert [step.probability for step in rule.steps] == pytest.approx([0.5, 1.0], abs=1e-12)
    fpr, tpr = _rates_of_rule(s, y, point)
    assert fpr == pytest.approx(1 / 3, abs=1e-12) and tpr == pytest.approx(1 / 2, abs=1e-12)


@st.composite
def _level_segment_case(draw: st.DrawFn) -> tuple[np.ndarray, np.ndarray, LpPoint]:
    """Rows whose hull has the level segment (f1, t1) -> (f1 + j n0, t1 + j p0) in counts,
    P = p0 m positives, N = n0 m negatives, and a point along it, possibly moved toward the
    diagonal."""
    p0, n0 = draw(st.integers(1, 9)), draw(st.integers(1, 9))
    m = draw(st.integers(2, 6))
    big_p, big_n = p0 * m, n0 * m
    j = draw(st.integers(1, m - 1))
    # The top band above the diagonal (t1 N > f1 P) and room for the bottom band's negatives.
    f1 = draw(st.integers(0, big_n - j * n0 - 1))
    lowest_t1 = f1 * big_p // big_n + 1
    if lowest_t1 > big_p - j * p0:
        f1, lowest_t1 = 0, 1
    t1 = draw(st.integers(lowest_t1, max(lowest_t1, big_p - j * p0)))
    t2, f2 = t1 + j * p0, f1 + j * n0
    s, y = _three_scores((t1, f1), (t2 - t1, f2 - f1), (big_p - t2, big_n - f2))
    along = draw(st.floats(0.0, 1.0))
    toward_diagonal = draw(st.floats(0.0, 1.0))
    d = draw(st.floats(0.0, 1.0))
    # As the LP reports a point: weights times the vertices' float rates.
    f = (1 - along) * f1 / big_n + along * f2 / big_n
    t = (1 - along) * t1 / big_p + along * t2 / big_p
    mu = 1.0 - toward_diagonal
    return s, y, LpPoint(mu * f + (1 - mu) * d, mu * t + (1 - mu) * d)


@settings(max_examples=300, deadline=None)
@given(_level_segment_case())
def test_every_point_on_or_below_a_level_segment_becomes_a_rule_with_its_rates(
    case: tuple[np.ndarray, np.ndarray, LpPoint],
) -> None:
    # Hardt, Price & Srebro 2016 ("Equality of Opportunity in Supervised Learning", NeurIPS,
    # section 4): mixing cuts reaches every point between the hull and the diagonal.
    s, y, point = case
    fpr, tpr = _rates_of_rule(s, y, point)
    assert fpr == pytest.approx(point.fpr, abs=1e-9)
    assert tpr == pytest.approx(point.tpr, abs=1e-9)


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(2, 80), st.integers(1, 8))
def test_hull_gains_order_like_exact_fractions(seed: int, n: int, distinct: int) -> None:
    # Reference: Python's fractions module (exact rational TP/P - FP/N): equal gains are
    # equal floats, and a larger gain is never a smaller float.
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 2, n).astype(np.int8)
    y[:2] = [0, 1]
    s = rng.integers(0, distinct, n) / 10.0
    curve = roc_curve(s, y)
    hull = hull_of(curve, 0.0)
    exact = [
        Fraction(int(t), curve.positives) - Fraction(int(f), curve.negatives)
        for t, f in zip(hull.tp, hull.fp, strict=True)
    ]
    gain = hull.gain
    for a in range(len(exact)):
        for b in range(len(exact)):
            if exact[a] == exact[b]:
                assert gain[a] == gain[b]
            elif exact[a] < exact[b]:
                assert gain[a] <= gain[b]


def _pinned_inside_a_level_segment() -> CalibrationData:
    """Invented, 22 rows. Group 's': 4 positives, 6 negatives, hull (0, 0), (1/6, 1/4),
    (2/3, 3/4), (1, 1), the middle segment of slope 1. Group 'b': 2 positives, 10
    negatives, hull (0, 0), (0, 1/2), (1, 1)."""
    s_scores, s_outcomes = _three_scores((1, 1), (2, 3), (1, 2))
    b_scores = np.array([0.8] + [0.2] * 11)
    b_outcomes = np.array([1, 1] + [0] * 10, dtype=np.int8)
    return CalibrationData(
        np.concatenate([s_scores, b_scores]),
        np.concatenate([s_outcomes, b_outcomes]),
        np.array([0] * 10 + [1] * 12, dtype=np.intp),
        ["s", "b"],
        ["g"],
    )


def test_equal_opportunity_pinned_inside_a_level_segment_derives() -> None:
    # Equal TPR t in both groups, cost FP + 4 FN; by hand, per unit of t on [1/4, 3/4]:
    # 's' moves along its level segment (4 positives, 6 negatives per unit: cost -10 per
    # unit up); 'b' gains 2 positives and 20 negatives per unit above 1/2 (+12) and loses 2
    # positives per unit below it (+8 per unit down). Up from 1/2: -10 + 12 > 0; down:
    # +10 + 8 > 0. So t = 1/2, half way along 's''s segment: FPR 5/12, acting at 0.9 and
    # with probability 1/2 at 0.5. (Before the fix: "the rule for 's' misses the LP point
    # by 0.25".)
    sol = solve(
        prepare(_pinned_inside_a_level_segment(), DeriveSettings(1.0, 4.0)),
        Criterion.EQUAL_OPPORTUNITY,
        0.0,
    )
    rates = {g.key: (float(g.counts.fpr[0]), float(g.counts.tpr[0])) for g in sol.groups}
    assert rates["s"] == pytest.approx((5 / 12, 0.5), abs=1e-12)
    assert rates["b"] == pytest.approx((0.0, 0.5), abs=1e-12)
    probabilities = rule_probabilities(sol.rules["s"], np.array([0.1, 0.5, 0.9]))
    assert probabilities.tolist() == pytest.approx([0.0, 0.5, 1.0], abs=1e-12)
