"""Warnings before outcomes: score drift comes from the Monte Carlo homogeneity test alone (the
index is shown beside it); action rates use the monthly tests; everything at the daily share of
the yearly level; re-running a day gives the same result."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import chi2_contingency

from service.audit.early_warning import (
    DAYS_PER_YEAR,
    DRAWS_PER_THRESHOLD,
    DayCounts,
    day_warnings,
)
from service.audit.realized import CellCounts
from service.audit.version_settings import resolve_settings
from service.policy.document import PolicyDocument
from tests.test_verdicts import document

BASELINE = [1000] * 10


def with_bins(**counts: list[int]) -> PolicyDocument:
    data = document().model_dump(mode="json", by_alias=True, exclude_none=True)
    data["targets"]["score_edges"] = [round(0.1 * i, 1) for i in range(1, 10)]
    for g in ("a", "b", "c"):
        data["targets"]["groups"][g]["score_counts"] = counts.get(g, BASELINE)
    return PolicyDocument.model_validate(data)


def day(doc: PolicyDocument, bins: dict[str, list[int]], actions: dict[str, int]) -> DayCounts:
    cells = {g: CellCounts(n=sum(b), actions=actions[g]) for g, b in bins.items()}
    return DayCounts(1, doc, resolve_settings(doc, cells, None, None), cells, bins)


def test_the_same_distribution_raises_no_warning_and_a_shift_does() -> None:
    doc = with_bins()
    rng = np.random.default_rng(5)
    quiet = {g: rng.multinomial(400, [0.1] * 10).tolist() for g in ("a", "b", "c")}
    w = day_warnings([day(doc, quiet, {"a": 120, "b": 120, "c": 140})])
    assert w.warnings == 0
    assert {r.status for r in w.drift} == {"no-evidence"}
    moved = dict(quiet, b=[0, 0, 10, 20, 40, 60, 70, 80, 60, 60])  # scores pushed up
    w = day_warnings([day(doc, moved, {"a": 120, "b": 120, "c": 140})])
    b = next(r for r in w.drift if r.group == "b")
    assert b.status == "drift" and b.psi is not None and b.psi >= 0.25
    assert w.level == pytest.approx(0.05 / DAYS_PER_YEAR)
    # No draw reaches the observed table: the smallest Monte Carlo p-value, 1 / (draws + 1),
    # with draws = 2 m / level for the m tests of the day, half the strictest Holm threshold.
    draws = math.ceil(DRAWS_PER_THRESHOLD * w.tests / w.level)
    assert (b.draws, b.p_value) == (draws, pytest.approx(1 / (draws + 1)))
    assert b.p_adjusted is not None and b.p_adjusted <= w.level / DRAWS_PER_THRESHOLD
    # Pearson's chi-square p-value of the same table (scipy chi2_contingency, Pearson 1900)
    # is far smaller still: the shift is beyond doubt either way.
    assert chi2_contingency([BASELINE, moved["b"]], correction=False).pvalue < 1e-20


def test_a_day_gives_the_same_result_when_run_again() -> None:
    doc = with_bins()
    rng = np.random.default_rng(8)
    bins = {g: rng.multinomial(60, [0.1] * 10).tolist() for g in ("a", "b", "c")}
    first = day_warnings([day(doc, bins, {"a": 18, "b": 18, "c": 21})], seed=[42, 7])
    again = day_warnings([day(doc, bins, {"a": 18, "b": 18, "c": 21})], seed=[42, 7])
    assert first == again
    other = day_warnings([day(doc, bins, {"a": 18, "b": 18, "c": 21})], seed=[42, 8])
    assert [r.p_value for r in other.drift] != [r.p_value for r in first.drift]


def test_one_case_in_an_empty_calibration_bin_raises_no_warning() -> None:
    # The old defect (error-rates.md): the chi-square p-value was 6.7e-06 for this day.
    doc = with_bins(b=[0, 16, 44, 66, 153, 200, 307, 365, 372, 425])
    bins = {"b": [1, 0, 1, 2, 4, 5, 8, 9, 9, 10]}
    w = day_warnings([day(doc, bins, {"b": 15})])
    (b,) = w.drift
    assert b.psi is not None and b.psi > 0.1  # the index alone would have warned
    assert b.p_value is not None and b.p_value > 0.01 and b.status == "no-evidence"


def test_a_large_group_warns_on_a_small_shift_whatever_the_index() -> None:
    # 5,000 cases, shares 0.09 and 0.11 against 0.1: the index is 0.01 (stable by common
    # practice), Pearson's statistic about 75 on 9 degrees of freedom: drift all the same.
    doc = with_bins()
    bins = {"b": [450] * 5 + [550] * 5}
    w = day_warnings([day(doc, bins, {"b": 1500})])
    (b,) = w.drift
    assert b.psi is not None and b.psi < 0.1
    assert b.status == "drift"


def test_a_small_group_never_warns_on_the_index_alone() -> None:
    doc = with_bins()
    # 25 cases in one day: the index is large by chance (about 9/25), the test is not.
    tiny = {"a": [3, 2, 3, 2, 3, 2, 3, 2, 3, 2], "b": [0, 5, 0, 5, 0, 5, 0, 5, 0, 5]}
    w = day_warnings([day(doc, tiny, {"a": 8, "b": 8})])
    b = next(r for r in w.drift if r.group == "b")
    assert b.psi is not None and b.psi > 0.25
    assert b.status == "no-evidence"


def test_action_rates_far_from_the_promise_warn() -> None:
    doc = with_bins()
    bins = {g: [100] * 10 for g in ("a", "b", "c")}
    w = day_warnings([day(doc, bins, {"a": 300, "b": 650, "c": 350})])  # b promised 0.30
    flagged = {a.check.group for a in w.actions if a.warning}
    assert flagged == {"b"}


def test_versions_without_calibration_bins_say_so() -> None:
    doc = document()
    cells = {"a": CellCounts(n=100, actions=30)}
    w = day_warnings([DayCounts(1, doc, resolve_settings(doc, cells, None, None), cells, {})])
    assert [r.status for r in w.drift] == ["no-baseline"]
