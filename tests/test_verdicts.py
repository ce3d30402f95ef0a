"""Monthly verdicts: each status comes from a named test, adjusted over the month's family.

The p-values are recomputed here independently of ``service.stats`` and the statuses are
checked against them: the score test by a numerical restricted maximum likelihood written in
this file (statsmodels 0.15's score test for a difference with a non-zero margin uses a wrong
coefficient in its cubic, statsmodels issue 10269, so it cannot serve as the reference there),
the ratio test with statsmodels, exact binomial tests with scipy, the adjustments with
statsmodels ``multipletests``.
"""

from __future__ import annotations

import math
from typing import Any

import pytest
from scipy.optimize import minimize_scalar
from scipy.stats import binomtest, norm
from statsmodels.stats import proportion as sm_proportion
from statsmodels.stats.multitest import multipletests

from service.audit.realized import CellCounts
from service.audit.verdicts import (
    Check,
    CheckKind,
    MonthContext,
    Procedure,
    Status,
    decide,
)
from service.audit.version_checks import version_checks
from service.audit.version_settings import DEFAULT_TOLERANCE, resolve_settings, strictest_plan
from service.policy.document import AuditPlan, PolicyDocument

EPS = 0.05
DECIDE = MonthContext(min_count=20, decide_outcomes=True)


def document(criterion: str = "equal-opportunity", **targets: Any) -> PolicyDocument:
    cut = {"steps": [{"from": 0.2, "probability": 1.0}]}
    groups = {
        "a": {"n": 5000, "action_rate": 0.3, "tpr": 0.7, "fpr": 0.2},
        "b": {"n": 2000, "action_rate": 0.3, "tpr": 0.7, "fpr": 0.2},
        "c": {"n": 300, "action_rate": 0.35, "tpr": 0.7, "fpr": 0.2},
    }
    return PolicyDocument.model_validate(
        {
            "name": "p",
            "score_meaning": "P(y = 1)",
            "action_label": "act",
            "no_action_label": "do not act",
            "favourable": "action",
            "costs": {"false_positive": 1, "false_negative": 4},
            "groups": {"attributes": ["g"], "known": ["a", "b", "c"]},
            "rules": {"a": cut, "b": cut, "c": cut},
            "targets": {"criterion": criterion, "tolerance": EPS, "groups": groups, **targets},
        }
    )


def cells(**by_group: tuple[int, int, int, int, int, int]) -> dict[str, CellCounts]:
    """(n, actions, observed, positives, tp, fp) per group."""
    return {
        g: CellCounts(n=n, actions=a, observed=o, positives=p, tp=tp, fp=fp)
        for g, (n, a, o, p, tp, fp) in by_group.items()
    }


BASE = cells(
    a=(4000, 1200, 4000, 800, 560, 640),
    b=(1500, 450, 1500, 300, 207, 243),
    c=(300, 105, 300, 60, 41, 64),
)


def run(doc: PolicyDocument, cs: dict[str, CellCounts], context: MonthContext = DECIDE, **kw: Any):
    settings = resolve_settings(doc, cs, kw.get("reference"), kw.get("tolerance"))
    checks = version_checks(1, doc, cs, settings, context)
    return decide(checks, strictest_plan([settings.plan]))


def score_p(k1: float, n1: float, k2: float, n2: float, delta: float, larger: bool) -> float:
    """One-sided Miettinen-Nurminen score test of H0: p1 - p2 = delta (Miettinen & Nurminen
    1985, Statistics in Medicine 4:213-226): the restricted maximum-likelihood estimates under
    the null found numerically, the variance with the factor N / (N - 1)."""

    def minus_log_likelihood(p2: float) -> float:
        p1 = p2 + delta
        return -(
            k1 * math.log(p1) + (n1 - k1) * math.log(1 - p1)
            + k2 * math.log(p2) + (n2 - k2) * math.log(1 - p2)
        )  # fmt: skip

    low, high = max(0.0, -delta) + 1e-12, min(1.0, 1.0 - delta) - 1e-12
    p2 = minimize_scalar(
        minus_log_likelihood, bounds=(low, high), method="bounded", options={"xatol": 1e-13}
    ).x
    p1 = p2 + delta
    n = n1 + n2
    variance = (p1 * (1 - p1) / n1 + p2 * (1 - p2) / n2) * n / (n - 1)
    z = (k1 / n1 - k2 / n2 - delta) / math.sqrt(variance)
    return float(norm.sf(z) if larger else norm.cdf(z))


def outside_and_inside(k1: float, n1: float, k2: float, n2: float) -> tuple[float, float]:
    up, down = score_p(k1, n1, k2, n2, EPS, True), score_p(k1, n1, k2, n2, -EPS, False)
    inside = max(score_p(k1, n1, k2, n2, -EPS, True), score_p(k1, n1, k2, n2, EPS, False))
    return min(1.0, 2 * min(up, down)), inside


def find(checks: list[Check], kind: CheckKind, metric: str, group: str) -> Check:
    (c,) = [x for x in checks if (x.kind, x.metric, x.group) == (kind, metric, group)]
    return c


def test_parity_p_values_are_score_tests_at_the_band_edges() -> None:
    checks, _ = run(document(), BASE)
    c = find(checks, CheckKind.PARITY, "tpr", "b")
    assert c.against == "a"  # the largest calibration group
    assert c.evidence is not None and c.evidence.procedure is Procedure.SCORE_DIFFERENCE
    outside, inside = outside_and_inside(207, 300, 560, 800)
    assert c.evidence.p_outside == pytest.approx(outside, rel=1e-6)
    assert c.evidence.p_inside == pytest.approx(inside, rel=1e-6)
    assert c.estimate == pytest.approx(207 / 300 - 560 / 800)


def test_the_family_is_adjusted_by_holm_over_every_tested_check() -> None:
    checks, family = run(document(), BASE)
    tested = [c for c in checks if c.evidence is not None]
    assert family.tests == len(tested) == 2 + 9  # two parity gaps, nine promises
    raw_out = [c.evidence.p_outside for c in tested]  # type: ignore[union-attr]
    raw_in = [c.evidence.p_inside for c in tested]  # type: ignore[union-attr]
    # statsmodels multipletests(method="holm") (Holm 1979).
    want_out = multipletests(raw_out, method="holm")[1]
    want_in = multipletests(raw_in, method="holm")[1]
    for c, wo, wi in zip(tested, want_out, want_in, strict=True):
        assert c.evidence is not None
        assert c.evidence.p_outside_adjusted == pytest.approx(wo, rel=1e-12)
        assert c.evidence.p_inside_adjusted == pytest.approx(wi, rel=1e-12)
        if wo <= 0.05:
            assert c.status is Status.BREACH
        elif wi <= 0.05:
            assert c.status is Status.HOLDS
        else:
            assert c.status is Status.UNDECIDED


def test_benjamini_yekutieli_when_the_plan_asks_for_it() -> None:
    doc = document().model_copy(update={"audit": AuditPlan(multiplicity="benjamini-yekutieli")})
    checks, family = run(doc, BASE)
    assert family.method == "benjamini-yekutieli"
    tested = [c for c in checks if c.evidence is not None]
    raw = [c.evidence.p_outside for c in tested]  # type: ignore[union-attr]
    want = multipletests(raw, method="fdr_by")[1]  # statsmodels, Benjamini & Yekutieli 2001
    got = [c.evidence.p_outside_adjusted for c in tested]  # type: ignore[union-attr]
    assert got == pytest.approx(list(want), rel=1e-12)


def test_a_large_real_gap_is_a_breach_a_tiny_one_holds_a_noisy_one_is_undecided() -> None:
    cs = cells(
        a=(20000, 6000, 20000, 4000, 2800, 3200),
        b=(20000, 6000, 20000, 4000, 2000, 3200),  # TPR 0.50 vs 0.70: far beyond 0.05
        c=(20000, 6000, 20000, 4000, 2810, 3200),  # TPR 0.7025: well inside
    )
    checks, _ = run(document(), cs)
    assert find(checks, CheckKind.PARITY, "tpr", "b").status is Status.BREACH
    assert find(checks, CheckKind.PARITY, "tpr", "c").status is Status.HOLDS
    noisy = cells(a=(400, 120, 400, 80, 56, 64), b=(400, 120, 400, 80, 50, 64))
    checks, _ = run(document(), noisy)
    # TPR 0.625 vs 0.70 on 80 positives each: neither shown.
    assert find(checks, CheckKind.PARITY, "tpr", "b").status is Status.UNDECIDED


def test_four_fifths_uses_the_calibration_comparator_not_this_months_maximum() -> None:
    doc = document("four-fifths")
    # Group c had the highest favourable rate in calibration (0.35); this month b happens to
    # have the highest realized one. The comparator stays c.
    cs = cells(
        a=(4000, 1000, 4000, 800, 500, 500),
        b=(1500, 600, 1500, 300, 200, 400),
        c=(300, 100, 300, 60, 40, 60),
    )
    checks, _ = run(doc, cs)
    ff = [c for c in checks if c.kind is CheckKind.FOUR_FIFTHS]
    assert {c.against for c in ff} == {"c"} and {c.group for c in ff} == {"a", "b"}
    a = find(checks, CheckKind.FOUR_FIFTHS, "favourable_rate", "a")
    assert a.evidence is not None and a.evidence.procedure is Procedure.LOG_RATIO
    # statsmodels: log-ratio test (Katz standard error) of H0: ratio >= 0.8.
    want = sm_proportion.test_proportions_2indep(
        1000, 4000, 100, 300, value=0.8, method="log", compare="ratio", alternative="smaller"
    ).pvalue
    assert a.evidence.p_outside == pytest.approx(want, rel=1e-9)
    assert a.estimate == pytest.approx((1000 / 4000) / (100 / 300))  # 0.75: below the line
    # ... but its interval reaches 0.8, so the rule's point flag alone is not a breach.
    assert a.high is not None and a.high > 0.8
    assert a.status is not Status.BREACH


def test_a_configured_reference_is_both_gap_reference_and_comparator() -> None:
    doc = document("four-fifths", reference_group="b")
    settings = resolve_settings(doc, BASE, None, None)
    assert (settings.reference_group, settings.comparator_group) == ("b", "b")
    assert settings.reference_source == "version"
    override = resolve_settings(doc, BASE, "c", None)
    assert (override.reference_group, override.comparator_group) == ("c", "c")


def test_promises_without_calibration_counts_use_exact_binomial_tests() -> None:
    checks, _ = run(document(), BASE)
    c = find(checks, CheckKind.PROMISE, "tpr", "b")
    assert c.evidence is not None and c.evidence.procedure is Procedure.EXACT_BINOMIAL
    # scipy binomtest: exact one-sided tests at the band's edges 0.65 and 0.75.
    above = binomtest(207, 300, 0.75, alternative="greater").pvalue
    below = binomtest(207, 300, 0.65, alternative="less").pvalue
    assert c.evidence.p_outside == pytest.approx(min(1.0, 2 * min(above, below)), rel=1e-9)
    inside = max(
        binomtest(207, 300, 0.75, alternative="less").pvalue,
        binomtest(207, 300, 0.65, alternative="greater").pvalue,
    )
    assert c.evidence.p_inside == pytest.approx(inside, rel=1e-9)


def test_promises_with_out_of_sample_counts_are_a_second_sample() -> None:
    data = document().model_dump(mode="json", by_alias=True, exclude_none=True)
    counts = {"n": 2000, "positives": 400, "tp": 281.5, "fp": 320.25}
    data["targets"]["groups"]["b"]["out_of_sample"] = counts
    doc = PolicyDocument.model_validate(data)
    checks, _ = run(doc, BASE)
    c = find(checks, CheckKind.PROMISE, "tpr", "b")
    assert c.evidence is not None and c.evidence.procedure is Procedure.SCORE_DIFFERENCE
    # The band is centred on the calibration rate 281.5 / 400, not on the stored 0.7.
    assert c.band.low == pytest.approx(281.5 / 400 - EPS)
    outside, inside = outside_and_inside(207, 300, 281.5, 400)
    assert c.evidence.p_outside == pytest.approx(outside, rel=1e-6)
    assert c.evidence.p_inside == pytest.approx(inside, rel=1e-6)


def test_untested_checks_say_why_and_stay_out_of_the_family() -> None:
    small = cells(a=(4000, 1200, 4000, 800, 560, 640), b=(50, 15, 50, 10, 7, 8))
    checks, family = run(document(), small)
    assert find(checks, CheckKind.PARITY, "tpr", "b").status is Status.TOO_FEW
    assert find(checks, CheckKind.PROMISE, "action_rate", "b").status is not Status.TOO_FEW
    pending, _ = run(document(), BASE, MonthContext(min_count=20, decide_outcomes=False))
    assert find(pending, CheckKind.PARITY, "tpr", "b").status is Status.PENDING
    assert find(pending, CheckKind.PROMISE, "tpr", "a").status is Status.PENDING
    # The action rate needs no outcome: decided even in an immature month.
    assert find(pending, CheckKind.PROMISE, "action_rate", "a").evidence is not None
    doc = document().model_copy(update={"outcome_observed_after": "action"})
    selective, _ = run(doc, BASE)
    assert find(selective, CheckKind.PARITY, "tpr", "b").status is Status.NOT_IDENTIFIABLE
    assert family.tests == sum(1 for c in checks if c.evidence is not None)


def test_groups_recorded_outside_the_promise_are_exempt_from_the_criterion() -> None:
    base = document()
    assert base.targets is not None
    data = base.model_dump(mode="json", by_alias=True, exclude_none=True)
    data["targets"]["groups"]["c"]["outside_promise"] = "its parent rule misses TPR by 0.09"
    checks, _ = run(PolicyDocument.model_validate(data), BASE)
    assert find(checks, CheckKind.PARITY, "tpr", "c").status is Status.OUTSIDE_PROMISE
    # Its own promised rates are still checked.
    assert find(checks, CheckKind.PROMISE, "tpr", "c").evidence is not None


def test_tolerance_sources() -> None:
    doc = document()
    assert resolve_settings(doc, BASE, None, None).tolerance == EPS
    assert resolve_settings(doc, BASE, None, 0.2).tolerance_source == "auditor"
    data = doc.model_dump(mode="json", by_alias=True, exclude_none=True)
    data["targets"]["tolerance"] = 0.0  # a version stored before tolerances were required
    legacy = resolve_settings(PolicyDocument.model_validate(data), BASE, None, None)
    assert (legacy.tolerance, legacy.tolerance_source) == (DEFAULT_TOLERANCE, "default")


def test_the_strictest_plan_governs_a_month_with_several_versions() -> None:
    plan = strictest_plan(
        [
            AuditPlan(level=0.1, multiplicity="benjamini-yekutieli", maturity_days=30),
            AuditPlan(level=0.05, multiplicity="holm", maturity_share=0.8),
        ]
    )
    assert (plan.level, plan.multiplicity) == (0.05, "holm")
    assert (plan.maturity_share, plan.maturity_days) == (0.9, 60)


def _with_errors(counts: dict[str, float], errors: dict[str, float] | None) -> PolicyDocument:
    data = document().model_dump(mode="json", by_alias=True, exclude_none=True)
    data["targets"]["groups"]["b"]["out_of_sample"] = counts
    if errors is not None:
        data["targets"]["groups"]["b"]["standard_errors"] = errors
        data["targets"]["resamples"] = 100
    return PolicyDocument.model_validate(data)


def test_promises_with_standard_errors_count_their_effective_sample_size() -> None:
    counts = {"n": 2000, "positives": 400, "tp": 281.5, "fp": 320.25}
    doc = _with_errors(counts, {"action_rate": 0.02, "tpr": 0.04, "fpr": 0.01})
    checks, _ = run(doc, BASE)
    c = find(checks, CheckKind.PROMISE, "tpr", "b")
    assert c.evidence is not None and c.evidence.procedure is Procedure.SCORE_DIFFERENCE_WIDENED
    # Rao & Scott 1992 (Biometrics 48:577-585): the promise p = 281.5 / 400 with standard
    # error 0.04 counts as p (1 - p) / 0.04^2 binomial cases (design effect
    # 0.04^2 / (p (1 - p) / 400) = 3.07 > 1), its count p times that.
    p = 281.5 / 400
    n_eff = p * (1 - p) / 0.04**2
    assert 400 / n_eff > 1
    outside, inside = outside_and_inside(207, 300, p * n_eff, n_eff)
    assert c.evidence.p_outside == pytest.approx(outside, rel=1e-6)
    assert c.evidence.p_inside == pytest.approx(inside, rel=1e-6)
    # Wider than the binomial second sample of the same counts: less evidence either way.
    plain = find(run(_with_errors(counts, None), BASE)[0], CheckKind.PROMISE, "tpr", "b")
    assert plain.evidence is not None and plain.evidence.procedure is Procedure.SCORE_DIFFERENCE
    assert c.evidence.p_outside >= plain.evidence.p_outside
    assert c.evidence.p_inside > plain.evidence.p_inside
    # The band stays centred on the promise; the interval widens.
    assert c.band.low == pytest.approx(p - EPS)
    assert c.low is not None and plain.low is not None and c.low < plain.low


def test_the_widened_test_matches_statsmodels_with_an_effective_sample_size() -> None:
    # A month that acted on every case of b (1500 of 1500) against a promised action rate of
    # 0.97 over 2000 calibration rows with a bootstrap standard error of 0.01. statsmodels'
    # score test (test_proportions_2indep, method="score", correction=True: Miettinen &
    # Nurminen 1985) is right when its second sample has no failures (its issue 10269), so
    # the samples are swapped there: p1 - p2 vs +-eps is p2 - p1 vs -+eps.
    counts = {"n": 2000, "positives": 400, "tp": 400.0, "fp": 1540.0}
    doc = _with_errors(counts, {"action_rate": 0.01})
    month = cells(
        a=(4000, 1200, 4000, 800, 560, 640),
        b=(1500, 1500, 1500, 300, 300, 1200),
        c=(300, 105, 300, 60, 41, 64),
    )
    checks, _ = run(doc, month)
    c = find(checks, CheckKind.PROMISE, "action_rate", "b")
    assert c.evidence is not None and c.evidence.procedure is Procedure.SCORE_DIFFERENCE_WIDENED
    p = 1940 / 2000
    n_eff = p * (1 - p) / 0.01**2  # 2000 / design effect 6.87 (Rao & Scott 1992)

    def sm(value: float, alternative: str) -> float:
        res = sm_proportion.test_proportions_2indep(
            p * n_eff, n_eff, 1500, 1500, value=value, method="score", compare="diff",
            alternative=alternative, correction=True,
        )  # fmt: skip
        return float(res.pvalue)

    above, below = sm(-EPS, "smaller"), sm(EPS, "larger")
    inside = max(sm(EPS, "smaller"), sm(-EPS, "larger"))
    assert c.evidence.p_outside == pytest.approx(min(1.0, 2 * min(above, below)), rel=1e-6)
    assert c.evidence.p_inside == pytest.approx(inside, rel=1e-6)


def test_a_standard_error_below_the_binomial_one_changes_nothing() -> None:
    # The design effect is never below 1: a bootstrap spread smaller than the binomial one
    # (sampling noise of the bootstrap) does not make the promise count more than its rows.
    counts = {"n": 2000, "positives": 400, "tp": 281.5, "fp": 320.25}
    tiny = {"action_rate": 1e-4, "tpr": 1e-4, "fpr": 1e-4}
    widened = run(_with_errors(counts, tiny), BASE)[0]
    plain = run(_with_errors(counts, None), BASE)[0]
    for metric in ("action_rate", "tpr", "fpr"):
        a = find(widened, CheckKind.PROMISE, metric, "b").evidence
        b = find(plain, CheckKind.PROMISE, metric, "b").evidence
        assert a is not None and b is not None
        assert (a.p_outside, a.p_inside) == (b.p_outside, b.p_inside)


def test_standard_errors_need_out_of_sample_counts() -> None:
    data = document().model_dump(mode="json", by_alias=True, exclude_none=True)
    data["targets"]["groups"]["b"]["standard_errors"] = {"tpr": 0.02}
    with pytest.raises(ValueError, match="need out_of_sample"):
        PolicyDocument.model_validate(data)
