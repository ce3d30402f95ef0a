"""Holm and Benjamini-Yekutieli adjusted p-values.

Reference implementation: statsmodels.stats.multitest.multipletests(p, method="holm")[1]
(Holm 1979, Scandinavian Journal of Statistics 6:65-70) and method="fdr_by" (Benjamini &
Yekutieli 2001, Annals of Statistics 29:1165-1188).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.multitest import multipletests

from service.stats.multiplicity import adjust_p_values

REFERENCE = {"holm": "holm", "benjamini-yekutieli": "fdr_by"}


def _vectors() -> list[list[float]]:
    rng = np.random.default_rng(20240601)
    vectors: list[list[float]] = [
        [0.03],
        [1.0],
        [0.0],
        [0.01, 0.01, 0.01],  # ties
        [0.04, 1.0, 0.001, 1.0, 0.04, 0.2],  # ties and ones
        [0.0, 0.0, 0.5],
    ]
    for m in (2, 5, 13, 50, 400):
        vectors.append(list(rng.uniform(size=m)))
        vectors.append(list(rng.uniform(size=m) ** 6))  # many small
        vectors.append(list(np.round(rng.uniform(size=m), 2)))  # many ties
    return vectors


@pytest.mark.parametrize("method", ["holm", "benjamini-yekutieli"])
@pytest.mark.parametrize("p", _vectors())
def test_matches_statsmodels(p: list[float], method: str) -> None:
    ref = multipletests(p, method=REFERENCE[method])[1]
    assert adjust_p_values(p, method) == pytest.approx(list(ref), rel=1e-12, abs=1e-15)  # type: ignore[arg-type]


def test_worked_values() -> None:
    # Holm by hand: sorted 0.01, 0.02, 0.04 -> 3 * 0.01, max(0.03, 2 * 0.02), max(0.04, 0.04).
    assert adjust_p_values([0.04, 0.01, 0.02], "holm") == pytest.approx([0.04, 0.03, 0.04])
    # BY by hand, m = 2, c(2) = 1.5: sorted 0.01, 0.04 -> min(1.5*2*0.01/1, 1.5*2*0.04/2)=0.03,
    # then 1.5 * 2 * 0.04 / 2 = 0.06.
    assert adjust_p_values([0.04, 0.01], "benjamini-yekutieli") == pytest.approx([0.06, 0.03])


def test_empty_and_bad_input() -> None:
    assert adjust_p_values([], "holm") == []
    assert adjust_p_values((), "benjamini-yekutieli") == []
    for bad in ([math.nan], [0.2, -0.01], [1.5], [math.inf]):
        for method in ("holm", "benjamini-yekutieli"):
            with pytest.raises(ValueError, match="must lie in"):
                adjust_p_values(bad, method)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="method"):
        adjust_p_values([0.1], "bonferroni")  # type: ignore[arg-type]


p_lists = st.lists(st.floats(0.0, 1.0), max_size=60)


@settings(max_examples=200, deadline=None)
@given(p=p_lists, method=st.sampled_from(["holm", "benjamini-yekutieli"]))
def test_properties(p: list[float], method: str) -> None:
    adj = adjust_p_values(p, method)  # type: ignore[arg-type]
    assert len(adj) == len(p)
    for raw, a in zip(p, adj, strict=True):
        assert raw <= a + 1e-15 and 0.0 <= a <= 1.0
    # Order-preserving: a smaller raw p-value never gets a larger adjusted one (and ties
    # get equal ones).
    pairs = sorted(zip(p, adj, strict=True))
    for (p_a, a), (p_b, b) in itertools.pairwise(pairs):
        assert a <= b if p_a < p_b else a == b


# (Few examples: statsmodels' Holm branch runs gc.collect() on every call.)
@settings(max_examples=40, deadline=None)
@given(p=p_lists.filter(bool), method=st.sampled_from(["holm", "benjamini-yekutieli"]))
def test_random_vectors_match_statsmodels(p: list[float], method: str) -> None:
    ref = multipletests(p, method=REFERENCE[method])[1]
    assert adjust_p_values(p, method) == pytest.approx(list(ref), rel=1e-12, abs=1e-15)  # type: ignore[arg-type]
