"""Warnings before outcomes: score drift needs the index AND the test; action rates use the
monthly tests; everything at the daily share of the yearly level."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import chi2_contingency

from service.audit.early_warning import DAYS_PER_YEAR, DayCounts, day_warnings
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
    assert b.status == "major-drift" and b.psi is not None and b.psi >= 0.25
    # Pearson's homogeneity test of the 2 x 10 table, scipy chi2_contingency (Pearson 1900).
    want = chi2_contingency([BASELINE, moved["b"]], correction=False)
    assert b.p_value == pytest.approx(want.pvalue, rel=1e-9)
    assert w.level == pytest.approx(0.05 / DAYS_PER_YEAR)


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
