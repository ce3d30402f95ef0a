"""Properties of rules and their evaluation (hypothesis)."""

from __future__ import annotations

import itertools

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from service.policy.derive import solve
from service.policy.document import Costs, Groups, PolicyDocument, Rule, Step
from service.policy.rules import evaluate, evaluate_batch, rule_probabilities
from service.policy.targets import Criterion
from service.policy.units import CalibrationData, DeriveSettings, prepare

unit = st.floats(0.0, 1.0, allow_nan=False)


@st.composite
def rules(draw: st.DrawFn) -> Rule:
    starts = sorted(draw(st.sets(unit, min_size=1, max_size=5)))
    probs = sorted(draw(st.lists(unit, min_size=len(starts), max_size=len(starts))))
    return Rule(steps=[Step(start=s, probability=p) for s, p in zip(starts, probs, strict=True)])


def _policy(rule_a: Rule, rule_b: Rule) -> PolicyDocument:
    return PolicyDocument(
        name="prop",
        score_meaning="P(y)",
        action_label="act",
        no_action_label="wait",
        favourable="action",
        costs=Costs(false_positive=1, false_negative=4),
        groups=Groups(attributes=["g"], known=["a", "b"]),
        rules={"a": rule_a, "b": rule_b},
    )


@given(rules(), st.lists(unit, min_size=2, max_size=30))
def test_rules_are_monotone_and_vector_lookup_matches_scalar(
    rule: Rule, scores: list[float]
) -> None:
    ordered = sorted(scores)
    probs = [rule.probability_at(s) for s in ordered]
    assert all(a <= b for a, b in itertools.pairwise(probs))
    vector = rule_probabilities(rule, np.array(ordered))
    assert [float(v) for v in vector] == probs


@given(rules(), unit, unit, st.text(max_size=12))
def test_higher_score_never_loses_the_action(rule: Rule, s1: float, s2: float, case: str) -> None:
    policy = _policy(rule, rule)
    low, high = sorted((s1, s2))
    d_low = evaluate(policy, 1, low, {"g": "a"}, case, b"secret")
    d_high = evaluate(policy, 1, high, {"g": "a"}, case, b"secret")
    assert d_low.draw == d_high.draw
    assert not (d_low.action and not d_high.action)


@given(
    rules(),
    rules(),
    st.lists(st.tuples(unit, st.sampled_from(["a", "b"]), st.text(max_size=10)), max_size=40),
)
def test_batch_is_bit_identical_to_scalar(rule_a: Rule, rule_b: Rule, cases: list) -> None:  # type: ignore[type-arg]
    policy = _policy(rule_a, rule_b)
    scores = [c[0] for c in cases]
    groups = [c[1] for c in cases]
    ids = [c[2] for c in cases]
    batch = evaluate_batch(policy, 3, scores, groups, ids, b"k")
    for i, (s, g, cid) in enumerate(cases):
        one = evaluate(policy, 3, s, {"g": g}, cid, b"k")
        assert one.action == bool(batch.action[i])
        assert one.probability == float(batch.probability[i])
        assert one.draw == float(batch.draw[i])
        assert (one.group, one.rule) == (batch.group[i], batch.rule[i])


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**32 - 1), st.sampled_from(list(Criterion)), st.sampled_from([0.0, 0.02]))
def test_derived_rules_are_monotone_and_keep_their_promises(
    seed: int, criterion: Criterion, tolerance: float
) -> None:
    rng = np.random.default_rng(seed)
    n = 300
    g = rng.integers(0, 3, size=n)
    y = (rng.random(n) < 0.2 + 0.1 * g).astype(np.int8)
    y[:6] = [0, 1, 0, 1, 0, 1]
    g[:6] = [0, 0, 1, 1, 2, 2]
    s = np.round(np.clip(0.3 * y + rng.random(n) * 0.7, 0, 1), 2)
    data = CalibrationData(s, y, g.astype(np.intp), ["0", "1", "2"], ["g"])
    sol = solve(prepare(data, DeriveSettings(1.0, 4.0)), criterion, tolerance)
    grid = np.linspace(0, 1, 201)
    for rule in sol.rules.values():
        p = rule_probabilities(rule, grid)
        assert np.all(np.diff(p) >= 0) and p.min() >= 0 and p.max() <= 1
    if criterion is Criterion.EQUAL_OPPORTUNITY:
        tprs = [float(r.counts.tpr[0]) for r in sol.groups]
        assert max(tprs) - min(tprs) <= tolerance + 1e-9
