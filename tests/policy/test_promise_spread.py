"""Bootstrap standard errors of cross-fitted promises (service.policy.promise_spread).

The bootstrap is checked where its answer is known from outside: for a FIXED rule a
group's action rate is a plain proportion of its rows, whose bootstrap standard error is
sqrt(p (1 - p) / n) up to Monte Carlo error (Efron & Tibshirani 1993, An Introduction to the
Bootstrap, ch. 6, from memory for the chapter: the ideal bootstrap standard error of a mean is
the plug-in one, for a proportion sqrt(p_hat (1 - p_hat) / n)); the error bootstrap of a
fixed rule (promise on the resample minus the rule's rate on the original rows; ch. 10) gives
the same. The served rules' rates are checked against a direct reading of the step rule.
Then the cross-fitted version: seeded, within groups, wider than the binomial error of the
out-of-sample counts for a large group; and the error bootstrap against the MEASURED spread
of promise minus truth on simulated calibration samples (the quantity it estimates).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from service.policy.crossfit import assign_folds, cross_fit
from service.policy.derive import solve
from service.policy.derive_document import PolicyIdentity, build_document
from service.policy.document import PolicyDocument, Rule
from service.policy.promise_spread import (
    ERROR_METHOD,
    PROMISE_METHOD,
    bootstrap_errors,
    bootstrap_spreads,
    bootstrap_standard_errors,
    resample_rows,
    served_rates,
)
from service.policy.targets import Criterion
from service.policy.units import CalibrationData, DeriveError, DeriveSettings, prepare

SETTINGS = DeriveSettings(cost_fp=1.0, cost_fn=4.0)


def _draw(seed: int, n: int) -> CalibrationData:
    """Invented: three groups, different prevalences, scores noisier in higher groups."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, 3, n)
    logit = -1.6 + 0.5 * g + rng.normal(0, 1, n)
    y = (rng.random(n) < 1 / (1 + np.exp(-logit))).astype(np.int8)
    s = np.round(1 / (1 + np.exp(-(logit + rng.normal(0, 0.6 + 0.3 * g, n)))), 4)
    return CalibrationData(s, y, g.astype(np.intp), ["0", "1", "2"], ["g"])


def test_resamples_keep_every_group_and_its_size() -> None:
    codes = np.array([0, 0, 0, 1, 1, 2, 2, 2, 2], dtype=np.intp)
    rows = resample_rows(codes, 3, np.random.default_rng(5))
    assert np.bincount(codes[rows], minlength=3).tolist() == [3, 2, 4]


def test_the_bootstrap_error_of_a_fixed_rules_rate_is_the_binomial_one() -> None:
    data = _draw(1, 6000)
    acted = data.scores >= 0.3  # a fixed rule: act at 0.3 and above
    keys = data.group_keys

    def action_rate(rows: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
        codes = data.group_codes[rows]
        hits = np.bincount(codes, weights=acted[rows].astype(float), minlength=3)
        return {"action_rate": hits / np.bincount(codes, minlength=3)}

    spread = bootstrap_standard_errors(
        data.group_codes, keys, action_rate, ("action_rate",), resamples=800, seed=3
    )
    assert spread.used == 800 and not spread.failures
    for g, key in enumerate(keys):
        mine = data.group_codes == g
        n = int(mine.sum())
        p = float(acted[mine].mean())
        # Efron & Tibshirani 1993, ch. 6: sqrt(p (1 - p) / n). The bootstrap's own error:
        # a standard deviation from B = 800 resamples is off by about 1 / sqrt(2 B) = 2.5%
        # (common practice); allow 4 of those.
        expected = math.sqrt(p * (1 - p) / n)
        se = spread.of(key)["action_rate"]
        assert se is not None
        assert se == pytest.approx(expected, rel=0.10)


def test_the_error_bootstrap_of_a_fixed_rule_is_the_binomial_one() -> None:
    # No refit: the resample's "promise" is the fixed rule's action rate on the resample, its
    # truth in the bootstrap world the rate on the original rows (a constant), so the
    # error's spread is the proportion's: sqrt(p (1 - p) / n) (Efron & Tibshirani 1993,
    # ch. 6 and ch. 10, from memory for the chapters).
    data = _draw(5, 6000)
    acted = (data.scores >= 0.3).astype(float)
    original = np.bincount(data.group_codes, weights=acted, minlength=3) / np.bincount(
        data.group_codes, minlength=3
    )

    def error(rows: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
        codes = data.group_codes[rows]
        hits = np.bincount(codes, weights=acted[rows], minlength=3)
        rate = hits / np.bincount(codes, minlength=3)
        return {"action_rate": rate - original}

    spread = bootstrap_standard_errors(
        data.group_codes, data.group_keys, error, ("action_rate",), resamples=800, seed=4
    )
    for g, key in enumerate(data.group_keys):
        n = int((data.group_codes == g).sum())
        expected = math.sqrt(original[g] * (1 - original[g]) / n)
        se = spread.of(key)["action_rate"]
        assert se is not None and se == pytest.approx(expected, rel=0.10)


def _direct_rates(rule: Rule, scores: np.ndarray, outcomes: np.ndarray) -> dict[str, float]:
    """P(action | score) read off the step rule row by row (the last step starting at or
    below the score), averaged over the group's rows, positives and negatives."""
    starts = np.array([step.start for step in rule.steps])
    probs = np.array([0.0] + [step.probability for step in rule.steps])
    p = probs[np.searchsorted(starts, scores, side="right")]
    return {
        "action_rate": float(p.mean()),
        "tpr": float(p[outcomes == 1].mean()),
        "fpr": float(p[outcomes == 0].mean()),
    }


def test_served_rates_are_the_rules_expected_rates_on_the_rows() -> None:
    data = _draw(6, 3000)
    prepared = prepare(data, SETTINGS)
    solution = solve(prepared, Criterion.EQUAL_OPPORTUNITY, 0.05)
    other = _draw(7, 5000)  # rates of the same rules on rows they were not fitted on
    for rows in (data, other):
        rates = served_rates(rows, solution)
        for g, result in enumerate(solution.groups):
            mine = rows.group_codes == g
            direct = _direct_rates(
                solution.rules[result.rule_key], rows.scores[mine], rows.outcomes[mine]
            )
            for name, value in direct.items():
                assert rates[name][g] == pytest.approx(value, abs=1e-12)


def test_the_error_bootstrap_tracks_the_measured_error_of_the_promise() -> None:
    # Simulated: the promise minus the TRUE rate of the served rule (its rate on 400,000
    # fresh rows) over 60 calibration samples; the error bootstrap's standard error (root
    # mean square over 4 samples, 30 resamples each) must match that spread within the
    # Monte Carlo error of both (about 9% for an sd of 60 values and 7% for the bootstrap,
    # common practice; allowed 35%), and the promise's own spread must be the larger.
    crit = Criterion.EQUAL_OPPORTUNITY
    fresh = _draw(10_000, 400_000)
    errors: list[float] = []
    boot: dict[str, list[float]] = {ERROR_METHOD: [], PROMISE_METHOD: []}
    for i in range(60):
        data = _draw(100 + i, 3000)
        prepared = prepare(data, SETTINGS)
        cross = cross_fit(prepared, [crit], assign_folds(data, 5, i), 5, 0.05)[crit]
        assert not isinstance(cross, DeriveError)
        truth = served_rates(fresh, solve(prepared, crit, 0.05))
        errors.append(float(cross.counts().fpr[0] - truth["fpr"][0]))
        if i < 4:
            both = bootstrap_spreads(
                prepared,
                crit,
                0.05,
                5,
                methods=(ERROR_METHOD, PROMISE_METHOD),
                resamples=30,
                seed=i,
            )
            for method, spread in both.items():
                se = spread.of("0")["fpr"]
                assert se is not None
                boot[method].append(se)
    measured = float(np.std(errors, ddof=1))
    error_se = math.sqrt(float(np.mean(np.square(boot[ERROR_METHOD]))))
    promise_se = math.sqrt(float(np.mean(np.square(boot[PROMISE_METHOD]))))
    assert error_se == pytest.approx(measured, rel=0.35)
    assert promise_se > error_se


def test_cross_fitted_errors_are_seeded_and_wider_than_binomial_for_the_largest_group() -> None:
    data = _draw(2, 4000)
    prepared = prepare(data, SETTINGS)
    crit = Criterion.EQUAL_OPPORTUNITY
    one = bootstrap_errors(prepared, crit, 0.05, 5, resamples=30, seed=7)
    again = bootstrap_errors(prepared, crit, 0.05, 5, resamples=30, seed=7)
    other = bootstrap_errors(prepared, crit, 0.05, 5, resamples=30, seed=8)
    assert one.standard_errors == again.standard_errors
    assert one.standard_errors != other.standard_errors
    assert one.used == 30 and not one.failures
    # The promise itself, and the binomial error the audit would give it without the bootstrap.
    folds = assign_folds(data, 5, 20261201)
    cross = cross_fit(prepared, [crit], folds, 5, 0.05)[crit]
    assert not isinstance(cross, DeriveError)
    counts = cross.group_counts("0")
    negatives = counts.n - counts.positives
    fpr = counts.fp / negatives
    binomial = math.sqrt(fpr * (1 - fpr) / negatives)
    se = one.of("0")["fpr"]
    assert se is not None and se > binomial


def test_the_document_stores_the_errors_and_stays_valid_without_them() -> None:
    data = _draw(3, 3000)
    prepared = prepare(data, SETTINGS)
    crit = Criterion.EQUAL_OPPORTUNITY
    solution = solve(prepared, crit, 0.05)
    cross = cross_fit(prepared, [crit], assign_folds(data, 5, 1), 5, 0.05)[crit]
    assert not isinstance(cross, DeriveError)
    identity = PolicyIdentity("p", "", "P(y = 1)", "act", "do not act")
    spread = bootstrap_errors(prepared, crit, 0.05, 5, resamples=5, seed=1)
    doc = build_document(prepared, solution, cross, identity, spread)
    assert doc.targets is not None and doc.targets.resamples == 5
    for key in data.group_keys:
        errors = doc.targets.groups[key].standard_errors
        assert errors is not None and errors.model_dump() == spread.of(key)
    again = PolicyDocument.model_validate_json(doc.model_dump_json(by_alias=True))
    assert again == doc
    plain = build_document(prepared, solution, cross, identity)
    assert plain.targets is not None and plain.targets.resamples is None
    assert all(t.standard_errors is None for t in plain.targets.groups.values())


def test_too_few_resamples_and_unknown_methods_are_refused() -> None:
    data = _draw(4, 500)
    with pytest.raises(DeriveError, match="at least 2"):
        bootstrap_errors(prepare(data, SETTINGS), Criterion.EQUAL_OPPORTUNITY, 0.05, 5, resamples=1)
    with pytest.raises(DeriveError, match="spread methods"):
        bootstrap_errors(
            prepare(data, SETTINGS), Criterion.EQUAL_OPPORTUNITY, 0.05, 5, method="refits"
        )
