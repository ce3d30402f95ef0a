"""The derived document's promises and score bins, and the curve-based counts behind them."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.policy.crossfit import assign_folds, cross_fit
from service.policy.derive import solve
from service.policy.derive_document import (
    PolicyIdentity,
    build_document,
    score_counts,
    score_edges,
)
from service.policy.document import PolicyDocument, Rule, Step, document_json
from service.policy.rates import expected_counts, rule_bands
from service.policy.roc import counts_at, roc_curve
from service.policy.rules import rule_probabilities
from service.policy.targets import Criterion
from service.policy.units import CalibrationData, DeriveSettings, prepare

unit = st.floats(0.0, 1.0, allow_nan=False)


@st.composite
def rules(draw: st.DrawFn) -> Rule:
    starts = sorted(draw(st.sets(unit, min_size=1, max_size=5)))
    probs = sorted(draw(st.lists(unit, min_size=len(starts), max_size=len(starts))))
    return Rule(steps=[Step(start=s, probability=p) for s, p in zip(starts, probs, strict=True)])


@settings(max_examples=200, deadline=None)
@given(rules(), st.integers(1, 80), st.integers(1, 12), st.integers(0, 2**32 - 1))
def test_rule_bands_give_the_row_by_row_sums(rule: Rule, n: int, distinct: int, seed: int) -> None:
    # The expected counts read off the ROC curve equal the plain sums of P(action | score)
    # over rows (the definition); rule steps may fall on, between or outside the scores.
    rng = np.random.default_rng(seed)
    s = rng.integers(0, distinct + 1, n) / distinct
    y = rng.integers(0, 2, n).astype(np.int8)
    bands = rule_bands(rule, roc_curve(s, y))
    p = rule_probabilities(rule, s)
    direct = expected_counts(p, y)
    got = bands.counts()
    for a, b in ((got.tp, direct.tp), (got.fp, direct.fp), (got.fn, direct.fn)):
        assert float(a[0]) == pytest.approx(float(b[0]), abs=1e-9)
    row_cost = np.where(y == 1, 4.0 * (1 - p), 1.0 * p)
    total, squares = bands.cost_sums(1.0, 4.0)
    assert total == pytest.approx(float(row_cost.sum()), abs=1e-9)
    assert squares == pytest.approx(float((row_cost**2).sum()), abs=1e-9)


def test_counts_at_any_cut_match_a_direct_count() -> None:
    rng = np.random.default_rng(3)
    s = np.round(rng.random(500), 2)
    y = rng.integers(0, 2, 500).astype(np.int8)
    cuts = np.array([np.inf, 1.5, 1.0, 0.505, 0.5, 0.0, -1.0])
    tp, fp = counts_at(roc_curve(s, y), cuts)
    for c, a, b in zip(cuts, tp, fp, strict=True):
        assert (a, b) == (np.sum((s >= c) & (y == 1)), np.sum((s >= c) & (y == 0)))


# --- Score bins ---------------------------------------------------------------------------


def test_score_edges_are_the_inner_deciles() -> None:
    # 1..1000 / 1000: the inverted-CDF decile at q is the (1000 q)-th value (Hyndman & Fan
    # 1996, "Sample Quantiles in Statistical Packages", definition 1).
    s = np.arange(1, 1001) / 1000.0
    np.testing.assert_allclose(score_edges(s), np.arange(100, 1000, 100) / 1000.0)


def test_few_distinct_scores_give_fewer_edges_and_one_value_none() -> None:
    s = np.array([0.2] * 50 + [0.7] * 50)
    assert score_edges(s) == [0.7]  # 0.2 is the lowest score: no empty bin below it
    assert score_edges(np.full(20, 0.4)) == []
    # F(0.1) = 0.05, F(0.3) = 0.85: deciles 0.1 .. 0.8 are 0.3, the 0.9 decile is 0.9.
    assert score_edges(np.array([0.1] * 5 + [0.3] * 80 + [0.9] * 15)) == [0.3, 0.9]
    # Only the top 5% at 0.9: every decile is 0.3, deduplicated to one edge.
    assert score_edges(np.array([0.1] * 5 + [0.3] * 90 + [0.9] * 5)) == [0.3]


def test_score_counts_bin_j_is_closed_below_open_above() -> None:
    rng = np.random.default_rng(4)
    s = np.round(rng.random(3000), 2)
    codes = rng.integers(0, 3, 3000).astype(np.intp)
    data = CalibrationData(s, np.zeros(3000, np.int8), codes, ["a", "b", "c"], ["g"])
    edges = score_edges(s)
    assert len(edges) == 9
    got = score_counts(data, edges)
    bounds = [-np.inf, *edges, np.inf]
    for g in range(3):
        mine = s[codes == g]
        # The last bin is closed above: 1.0 lands in it (bounds end at +inf).
        expected = [np.sum((mine >= lo) & (mine < hi)) for lo, hi in itertools.pairwise(bounds)]
        assert got[g].tolist() == expected
    assert got.sum() == 3000


# --- The document ----------------------------------------------------------------------------


def test_document_promises_are_the_cross_fitted_ratios() -> None:
    rng = np.random.default_rng(8)
    n = 4000
    g = rng.integers(0, 2, n)
    y = (rng.random(n) < 0.2 + 0.1 * g).astype(np.int8)
    s = np.clip(0.3 * y + 0.7 * rng.random(n), 0, 1)
    data = CalibrationData(s, y, g.astype(np.intp), ["a", "b"], ["g"])
    prepared = prepare(data, DeriveSettings(1.0, 4.0))
    solution = solve(prepared, Criterion.DEMOGRAPHIC_PARITY, 0.03, capacity=0.5)
    cross = cross_fit(
        prepared, [Criterion.DEMOGRAPHIC_PARITY], assign_folds(data, 4, 1), 4, 0.03, capacity=0.5
    )[Criterion.DEMOGRAPHIC_PARITY]
    identity = PolicyIdentity("t", "", "P(y)", "act", "wait")
    policy = build_document(prepared, solution, cross, identity)  # type: ignore[arg-type]
    again = PolicyDocument.model_validate(document_json(policy))  # valid as JSON too
    targets = again.targets
    assert targets is not None
    assert (targets.folds, targets.capacity, targets.tolerance) == (4, 0.5, 0.03)
    assert targets.expected_cost == pytest.approx(cross.cost_per_case)  # type: ignore[union-attr]
    for i, key in enumerate(["a", "b"]):
        t = targets.groups[key]
        assert t.out_of_sample is not None
        assert t.out_of_sample.n == int((g == i).sum())
        assert t.out_of_sample.positives == int(y[g == i].sum())
        assert t.action_rate == pytest.approx(float(cross.counts().action_rate[i]), rel=1e-12)
        assert t.score_counts is not None and sum(t.score_counts) == t.out_of_sample.n
