"""Rates under selective labels: simulated populations with known true rates, a direct
row-by-row weighting written here independently, worst/best-case bounds and the mirror
between the two modes."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import precision_score

from service.stats.selective_labels import (
    SELECTIVE_METRICS,
    Mode,
    PartialRate,
    SelectiveCounts,
    selective_rates,
)


def true_rates(a: np.ndarray, y: np.ndarray) -> dict[str, float]:
    """The realized rates with every outcome known (the truth of a simulation)."""
    tp = float(np.sum((a == 1) & (y == 1)))
    fp = float(np.sum((a == 1) & (y == 0)))
    fn = float(np.sum((a == 0) & (y == 1)))
    tn = float(np.sum((a == 0) & (y == 0)))
    return {
        "prevalence": (tp + fn) / y.size,
        "tpr": tp / (tp + fn),
        "fpr": fp / (fp + tn),
        "ppv": tp / (tp + fp),
        "npv": tn / (tn + fn),
        "action_rate": (tp + fp) / y.size,
    }


def population(seed: int, n: int) -> tuple[np.random.Generator, np.ndarray, np.ndarray]:
    """Scores uniform on (0, 1), outcome probability score^1.5, and a rule that is 0 below
    0.3, 1 above 0.7 and linear in between."""
    rng = np.random.default_rng(seed)
    score = rng.random(n)
    y = (rng.random(n) < score**1.5).astype(float)
    p = np.clip((score - 0.3) / 0.4, 0.0, 1.0)
    return rng, y, p


def draw(rng: np.random.Generator, p: np.ndarray) -> np.ndarray:
    return (rng.random(p.size) < p).astype(float)  # exact at p = 0 and p = 1


# The rule with a floor (action mode) or a ceiling (no-action mode) has no never-observed zone.
NO_HIDDEN_ZONE = {"action": lambda p: np.maximum(p, 0.1), "no-action": lambda p: np.minimum(p, 0.9)}
IDENTIFIED = {"action": "ppv", "no-action": "npv"}


@pytest.mark.parametrize("mode", ["action", "no-action"])
def test_weighted_estimates_are_close_to_the_truth(mode: Mode) -> None:
    rng, y, p = population(101, 200_000)
    p = NO_HIDDEN_ZONE[mode](p)
    a = draw(rng, p)
    truth = true_rates(a, y)
    rates = selective_rates(SelectiveCounts.from_rows(p, a, y, mode))
    for metric in SELECTIVE_METRICS:
        r = rates[metric]
        assert r.value is not None
        # Standard errors here are at most 0.005 (measured over 40 redraws of the decisions);
        # leaving the weights out errs by 0.07 to 0.28 on this population.
        assert r.value == pytest.approx(truth[metric], abs=0.02), metric
        assert r.low == r.high == r.value
        expected_kind = "identified" if metric in (IDENTIFIED[mode], "action_rate") else "weighted"
        assert r.kind == expected_kind, metric
    # The identified rate is an ordinary ratio (scikit-learn on the observed rows).
    if mode == "action":
        assert rates["ppv"].value == pytest.approx(precision_score(y, a), abs=1e-12)
    else:
        assert rates["npv"].value == pytest.approx(precision_score(1 - y, 1 - a), abs=1e-12)


def direct_weighted(p: np.ndarray, a: np.ndarray, y: np.ndarray, mode: Mode) -> dict[str, float]:
    """Hajek weighting row by row: each hidden band case gets the weighted mean outcome of the
    observed band cases, weights (1 - pi) / pi = P(hidden) / P(observed)."""
    acted = a == 1
    seen = acted if mode == "action" else ~acted
    pi = p if mode == "action" else 1.0 - p
    band = (p > 0) & (p < 1)
    observed_band = band & seen
    hidden_band = band & ~seen
    share = np.average(y[observed_band], weights=(1 - pi[observed_band]) / pi[observed_band])
    y_filled = np.where(seen, y, 0.0)  # outcomes as the data know them
    y_filled[hidden_band] = share  # each hidden band case counts as `share` of a positive
    tp = np.sum(y_filled[acted])
    fp = np.sum(1 - y_filled[acted])
    fn = np.sum(y_filled[~acted])
    tn = np.sum(1 - y_filled[~acted])
    return {
        "prevalence": float(np.mean(y_filled)),
        "tpr": float(tp / (tp + fn)),
        "fpr": float(fp / (fp + tn)),
        "ppv": float(tp / (tp + fp)),
        "npv": float(tn / (tn + fn)),
    }


@pytest.mark.parametrize("mode", ["action", "no-action"])
@pytest.mark.parametrize("seed", [1, 2])
def test_weighted_estimate_equals_a_row_by_row_computation(mode: Mode, seed: int) -> None:
    rng, y, p = population(seed, 5_000)
    p = NO_HIDDEN_ZONE[mode](p)
    a = draw(rng, p)
    rates = selective_rates(SelectiveCounts.from_rows(p, a, y, mode))
    for metric, value in direct_weighted(p, a, y, mode).items():
        assert rates[metric].value == pytest.approx(value, abs=1e-12), metric


def test_weighting_is_nearly_unbiased_over_repeated_draws() -> None:
    # Design-based check: the population is fixed, only the randomized decisions are redrawn.
    rng, y, p = population(5, 20_000)
    p = np.maximum(p, 0.1)
    errors: dict[str, list[float]] = {m: [] for m in ("prevalence", "tpr", "fpr", "npv")}
    for _ in range(200):
        a = draw(rng, p)
        truth = true_rates(a, y)
        rates = selective_rates(SelectiveCounts.from_rows(p, a, y, "action"))
        for metric, errs in errors.items():
            value = rates[metric].value
            assert value is not None
            errs.append(value - truth[metric])
    for metric, errs in errors.items():
        # Each error has a standard deviation of at most 0.009 (measured), their mean of 200
        # one of at most 0.0006.
        assert abs(np.mean(errs)) < 0.002, metric


@pytest.mark.parametrize("mode", ["action", "no-action"])
def test_truth_lies_inside_the_bounds(mode: Mode) -> None:
    rng, y, p = population(202, 200_000)
    a = draw(rng, p)
    truth = true_rates(a, y)
    rates = selective_rates(SelectiveCounts.from_rows(p, a, y, mode))
    never = np.sum(p == 0) if mode == "action" else np.sum(p == 1)
    for metric in SELECTIVE_METRICS:
        r = rates[metric]
        assert r.low is not None and r.high is not None
        assert r.low <= truth[metric] <= r.high, metric
        if metric in (IDENTIFIED[mode], "action_rate"):
            assert r.kind == "identified"
            assert r.value == pytest.approx(truth[metric], abs=1e-12)
        else:
            assert r.kind == "bounds" and r.value is None, metric
            assert "never observed" in r.note
    # Prevalence: the never-observed cases are all negative or all positive.
    assert rates["prevalence"].high - rates["prevalence"].low == pytest.approx(never / y.size)


def test_bounds_collapse_without_an_unobserved_zone() -> None:
    rng, y, p = population(3, 4_000)
    p = np.maximum(p, 0.2)
    a = draw(rng, p)
    point = selective_rates(SelectiveCounts.from_rows(p, a, y, "action"))
    for r in point.values():
        assert r.kind in ("identified", "weighted")
        assert r.low == r.high == r.value
    # One case at p = 0 more: the bounds are narrow and hold the previous point.
    one_more = selective_rates(
        SelectiveCounts.from_rows(np.append(p, 0.0), np.append(a, 0.0), np.append(y, 1), "action")
    )
    for metric in ("prevalence", "tpr", "fpr", "npv"):
        r, before = one_more[metric], point[metric]
        assert r.kind == "bounds"
        assert r.low is not None and r.high is not None and before.value is not None
        assert r.low <= before.value <= r.high
        assert r.high - r.low < 2e-3


def mirror(r: PartialRate) -> tuple[str, float | None, float | None, float | None]:
    flip = None if r.value is None else 1 - r.value
    low = None if r.high is None else 1 - r.high
    high = None if r.low is None else 1 - r.low
    return (r.kind, flip, low, high)


# Swapping the decisions (p -> 1 - p, a -> 1 - a) and the mode swaps the columns of the
# confusion table: prevalence stays; TPR, FPR and the action rate become their complements,
# and PPV becomes 1 - NPV (the positives among the cases without action) and vice versa.
SAME = {"prevalence": "prevalence"}
COMPLEMENTED = {
    "tpr": "tpr",
    "fpr": "fpr",
    "ppv": "npv",
    "npv": "ppv",
    "action_rate": "action_rate",
}


@settings(max_examples=150, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 60), st.booleans())
def test_no_action_mode_mirrors_action_mode(seed: int, n: int, pending: bool) -> None:
    rng = np.random.default_rng(seed)
    p = rng.choice([0.0, 1.0, 0.25, 0.5, 0.9], size=n)
    a = draw(rng, p)
    y = (rng.random(n) < 0.4).astype(float)
    if pending:
        y[rng.random(n) < 0.2] = np.nan
    ours = selective_rates(SelectiveCounts.from_rows(p, a, y, "action"))
    theirs = selective_rates(SelectiveCounts.from_rows(1 - p, 1 - a, y, "no-action"))
    for mine, other in SAME.items():
        r, s = ours[mine], theirs[other]
        assert (r.kind, r.value, r.low, r.high) == pytest.approx((s.kind, s.value, s.low, s.high))
    for mine, other in COMPLEMENTED.items():
        r, s = ours[mine], theirs[other]
        assert (r.kind, r.value, r.low, r.high) == pytest.approx(mirror(s))


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 40), st.sampled_from(["action", "no-action"]))
def test_bounds_hold_the_truth_for_a_deterministic_rule(seed: int, n: int, mode: Mode) -> None:
    # With p in {0, 1} and outcomes missing at random on the observed side, nothing is
    # estimated: every true rate must lie within its bounds, whatever the data.
    rng = np.random.default_rng(seed)
    a = (rng.random(n) < 0.5).astype(float)
    y = (rng.random(n) < rng.random()).astype(float)
    shown = y.copy()
    shown[rng.random(n) < 0.3] = np.nan
    rates = selective_rates(SelectiveCounts.from_rows(a, a, shown, mode))
    tp, fp = np.sum(a * y), np.sum(a * (1 - y))
    fn, tn = np.sum((1 - a) * y), np.sum((1 - a) * (1 - y))
    truth = {
        "prevalence": (tp + fn) / n,
        "tpr": tp / (tp + fn) if tp + fn else None,
        "fpr": fp / (fp + tn) if fp + tn else None,
        "ppv": tp / (tp + fp) if tp + fp else None,
        "npv": tn / (tn + fn) if tn + fn else None,
    }
    for metric, value in truth.items():
        r = rates[metric]
        assert r.kind != "weighted"
        if value is None:
            continue
        assert r.low is not None and r.high is not None, metric
        assert r.low - 1e-12 <= value <= r.high + 1e-12, metric


def test_pending_outcomes_turn_an_identified_rate_into_bounds() -> None:
    p = np.array([1.0, 1.0, 1.0, 1.0])
    a = np.ones(4)
    rates = selective_rates(SelectiveCounts.from_rows(p, a, [1, 0, 1, np.nan], "action"))
    assert rates["ppv"].kind == "bounds"
    assert (rates["ppv"].low, rates["ppv"].high) == pytest.approx((0.5, 0.75))
    assert "1 not arrived" in rates["ppv"].note
    assert rates["npv"].kind == "none"  # no case without action
    assert rates["tpr"].kind == "bounds" and rates["tpr"].low == rates["tpr"].high == 1.0


def test_band_without_any_observed_case_is_bounded_not_weighted() -> None:
    # Three band cases, none drawn to action: nothing to weight them with.
    counts = SelectiveCounts(
        "action", certain_action=2, band=3, certain_action_positives=1, certain_action_negatives=1
    )
    rates = selective_rates(counts)
    assert rates["prevalence"].kind == "bounds"
    assert (rates["prevalence"].low, rates["prevalence"].high) == pytest.approx((0.2, 0.8))
    assert "no observed band case" in rates["prevalence"].note


def test_small_worked_counts() -> None:
    # Hand-computed: p = 1 cases: 10 (6 positive); band: 20 cases, 8 acted (3 positive, 5
    # negative), sum y/p = 12 and sum (1-y)/p = 10 over them; p = 0 cases: 5.
    counts = SelectiveCounts(
        "action",
        certain_action=10,
        band=20,
        certain_no_action=5,
        band_actions=8,
        certain_action_positives=6,
        certain_action_negatives=4,
        band_positives=3,
        band_negatives=5,
        band_weighted_positives=12.0,
        band_weighted_negatives=10.0,
    )
    rates = selective_rates(counts)
    # W1 = 12 - 3 = 9, W0 = 10 - 5 = 5; 12 hidden band cases: 12 * 9/14 positives.
    hidden_pos = 12 * 9 / 14
    assert rates["ppv"].value == pytest.approx(9 / 18)
    assert rates["action_rate"].value == pytest.approx(18 / 35)
    assert (rates["prevalence"].low, rates["prevalence"].high) == pytest.approx(
        ((9 + hidden_pos) / 35, (9 + hidden_pos + 5) / 35)
    )
    assert (rates["tpr"].low, rates["tpr"].high) == pytest.approx(
        (9 / (9 + hidden_pos + 5), 9 / (9 + hidden_pos))
    )
    assert (rates["npv"].low, rates["npv"].high) == pytest.approx(
        ((12 - hidden_pos) / 17, (12 - hidden_pos + 5) / 17)
    )


def test_no_cases() -> None:
    rates = selective_rates(SelectiveCounts("no-action"))
    assert all(r.kind == "none" and r.value is None for r in rates.values())


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"certain_no_action": 2, "certain_no_action_positives": 1}, "never observed"),
        ({"band": 3, "band_actions": 4}, "exceed band"),
        (
            {"band": 3, "band_actions": 1, "band_positives": 2, "band_weighted_positives": 3.0},
            "observed side",
        ),
        (
            {"band": 3, "band_actions": 2, "band_positives": 2, "band_weighted_positives": 1.5},
            "at least",
        ),
        ({"band": 3, "band_weighted_negatives": 1.5}, "no band_negatives"),
        (
            {"certain_action": 1, "certain_action_positives": 1, "certain_action_negatives": 1},
            "2 observed outcomes among 1",
        ),
        ({"band": -1}, "non-negative"),
    ],
)
def test_inconsistent_counts_are_refused(kwargs: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        SelectiveCounts("action", **kwargs)  # type: ignore[arg-type]


def test_from_rows_refuses_bad_rows() -> None:
    with pytest.raises(ValueError, match="contradicts"):
        SelectiveCounts.from_rows([1.0], [0], [1], "action")
    with pytest.raises(ValueError, match="0, 1 or NaN"):
        SelectiveCounts.from_rows([0.5], [1], [2], "action")
    with pytest.raises(ValueError, match="length"):
        SelectiveCounts.from_rows([0.5, 0.5], [1], [1], "action")
    with pytest.raises(ValueError, match="mode"):
        SelectiveCounts.from_rows([0.5], [1], [1], "both")  # type: ignore[arg-type]
