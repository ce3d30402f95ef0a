"""The snapshots built from counts: published and internal views, suppression, digest."""

from __future__ import annotations

import hashlib
import json
from datetime import UTC, datetime
from typing import Any

import pytest

from service.audit.month import Month
from service.audit.realized import CellCounts, ShadowCounts
from service.audit.snapshot import (
    CALIBRATION_CONFLICT,
    AuditInput,
    AuditResult,
    VersionCounts,
    build,
)
from service.audit.snapshot_model import CheckRow, Snapshot
from service.policy.document import PolicyDocument

NOW = datetime(2027, 1, 15, tzinfo=UTC)  # October 2026 is mature by then (60 days)


def policy(criterion: str = "equal-opportunity", observed_after: str = "both") -> PolicyDocument:
    cut = {"steps": [{"from": 0.2, "probability": 1.0}]}
    return PolicyDocument.model_validate(
        {
            "name": "fernhollow",
            "score_meaning": "P(readmission within 30 days)",
            "action_label": "offer follow-up",
            "no_action_label": "standard discharge",
            "favourable": "action",
            "outcome_observed_after": observed_after,
            "costs": {"false_positive": 1, "false_negative": 4},
            "groups": {"attributes": ["community"], "known": ["a", "b", "c"]},
            "rules": {"a": cut, "b": cut, "c": cut},
            "targets": {
                "criterion": criterion,
                "tolerance": 0.05,
                "expected_cost": 0.3,
                "groups": {
                    "a": {"n": 900, "prevalence": 0.2, "action_rate": 0.3, "tpr": 0.7, "fpr": 0.2},
                    "b": {"n": 400, "action_rate": 0.4, "tpr": 0.55, "fpr": 0.3},
                },
            },
        }
    )


CELLS = {
    "a": CellCounts(n=10000, actions=3000, observed=9000, positives=2000, tp=1400, fp=1500),
    "b": CellCounts(n=5000, actions=2000, observed=4500, positives=1000, tp=550, fp=1400),
    "c": CellCounts(n=30, actions=8, observed=30, positives=9, tp=5, fp=3),
}


def result(cells: dict[str, CellCounts] = CELLS, **kw: Any) -> AuditResult:
    doc = kw.pop("doc", policy())
    now = kw.pop("now", NOW)
    month = Month.parse(kw.pop("month", "2026-10"))
    start, end = month.bounds("UTC")
    return build(
        AuditInput(
            policy="fernhollow",
            month=month,
            time_zone="UTC",
            cohort_from=start,
            cohort_until=end,
            created_at=now,
            code_version="test",
            versions=[VersionCounts(1, doc, cells, kw.pop("shadows", {}), "h" * 64)],
            **kw,
        ),
        now,
    )


def snapshot(**kw: Any) -> Snapshot:
    return result(**kw).published


def check(s: Snapshot, kind: str, group: str, metric: str) -> CheckRow:
    found = [
        c for c in s.versions[0].checks if (c.check, c.group, c.metric) == (kind, group, metric)
    ]
    assert len(found) == 1
    return found[0]


def test_small_cells_are_suppressed_in_the_published_view_only() -> None:
    r = result()
    c_pub = next(g for g in r.published.versions[0].groups if g.group == "c")
    assert c_pub.counts["tp"] == "<11"
    assert c_pub.counts["tn"] is None  # 30 - ... would give the small counts back
    assert c_pub.rates["tpr"].withheld == "small-cell" and c_pub.rates["tpr"].value is None
    c_int = next(g for g in r.internal.versions[0].groups if g.group == "c")
    assert c_int.counts["tp"] == 5 and c_int.counts["tn"] == 18
    assert c_int.rates["tpr"].value == pytest.approx(5 / 9)
    assert (r.published.view, r.internal.view) == ("published", "internal")
    # The statuses are the same in both views: they are decided once, on the true counts.
    assert [c.status for c in r.published.versions[0].checks] == [
        c.status for c in r.internal.versions[0].checks
    ]


def test_a_check_on_hidden_counts_keeps_its_status_but_not_its_figures() -> None:
    s = snapshot()
    c = check(s, "promise", "a", "action_rate")
    assert c.evidence is not None and c.estimate.value is not None
    # c's TPR has 9 positives: below the minimum count.
    small = check(s, "parity", "c", "tpr")
    assert small.status == "too-few" and small.evidence is None
    assert "below 20" in small.message


def test_published_checks_carry_raw_and_adjusted_p_values_and_name_the_test() -> None:
    s = snapshot()
    c = check(s, "parity", "b", "tpr")
    assert c.evidence is not None
    assert c.evidence.procedure == "score-difference"
    assert c.evidence.p_outside <= c.evidence.p_outside_adjusted
    assert c.evidence.p_inside <= c.evidence.p_inside_adjusted
    assert f"{c.evidence.p_outside_adjusted:.2g}" in c.message or c.status != "breach"
    assert "Holm (1979)" in s.family.description and "Schuirmann 1987" in s.family.description
    assert s.family.tests == sum(1 for v in s.versions for x in v.checks if x.evidence)


def test_alerts_are_exactly_the_breaches() -> None:
    s = snapshot()
    breaches = [c for c in s.versions[0].checks if c.status == "breach"]
    assert breaches, "b's TPR of 0.55 against a's 0.70 is a breach of a 0.05 tolerance"
    breach_alerts = [a for a in s.alerts if a.level == "breach"]
    assert sorted(a.message for a in breach_alerts) == sorted(c.message for c in breaches)
    # The month's big gap also tips b's "below" chart: a watch alert from the monitoring.
    (watch,) = [a for a in s.alerts if a.level == "watch"]
    assert (watch.check, watch.metric, watch.group) == ("parity", "tpr", "b")
    assert s.alerts.index(watch) > max(s.alerts.index(a) for a in breach_alerts)


def test_selective_labels_give_not_identifiable_checks() -> None:
    s = snapshot(doc=policy(observed_after="action"))
    assert check(s, "parity", "b", "tpr").status == "not-identifiable"
    assert check(s, "promise", "a", "fpr").status == "not-identifiable"
    a = s.versions[0].groups[0]
    assert a.rates["tpr"].withheld == "not-identifiable"
    assert CALIBRATION_CONFLICT not in s.cautions
    assert CALIBRATION_CONFLICT in snapshot().cautions


def test_an_immature_month_leaves_outcome_checks_pending_unless_asked() -> None:
    early = datetime(2026, 11, 10, tzinfo=UTC)
    # 13,530 of 15,030 decisions have an outcome: 90.02%, mature by coverage.
    assert snapshot(now=early).maturity.state == "mature"
    few = {g: CellCounts(n=c.n, actions=c.actions) for g, c in CELLS.items()}
    s = snapshot(cells=few, now=early)
    assert s.maturity.state == "provisional" and s.maturity.outcome_checks == "pending"
    assert check(s, "parity", "b", "tpr").status == "pending"
    assert check(s, "promise", "a", "action_rate").evidence is not None
    s = snapshot(now=datetime(2026, 10, 20, tzinfo=UTC), provisional=True)
    assert s.maturity.reason == "the month has not ended"
    assert s.maturity.outcome_checks == "decided provisionally"
    assert check(s, "parity", "b", "tpr").evidence is not None


def test_digest_is_the_sha256_of_the_canonical_content() -> None:
    s = snapshot()
    content = s.content()
    digest = content.pop("digest")
    canonical = json.dumps(
        content, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")
    assert digest == hashlib.sha256(canonical).hexdigest()
    again = Snapshot.model_validate(s.content())
    assert again == s and again.computed_digest() == digest
    assert s.model_copy(update={"month": "2026-11"}).computed_digest() != digest


def test_shadow_rates() -> None:
    shadow = {2: {"a": ShadowCounts(1000, 320, 40, 900, 200, 150, 160)}}
    sg = snapshot(shadows=shadow).versions[0].shadows[0].groups[0]
    assert sg.counts["differs"] == 40
    assert sg.rates["tpr"].value == pytest.approx(0.75)
    assert sg.rates["differ_rate"].value == pytest.approx(0.04)


def test_promised_cost_is_the_groups_own() -> None:
    groups = {g.group: g for g in snapshot().versions[0].groups}
    # a: c_FP (1 - p) FPR + c_FN p (1 - TPR) = 0.8 x 0.2 + 4 x 0.2 x 0.3 = 0.4.
    assert groups["a"].cost_per_case.promised == pytest.approx(0.4)
    assert groups["b"].cost_per_case.promised is None  # no promised prevalence
    assert groups["c"].cost_per_case.promised is None  # no targets for c


def test_auditor_settings_are_recorded() -> None:
    s = snapshot(tolerance=0.3, reference_group="b")
    v = s.versions[0]
    assert (v.tolerance, v.tolerance_source) == (0.3, "auditor")
    assert (v.reference_group, v.reference_source) == ("b", "auditor")
    assert check(s, "parity", "a", "tpr").against == "b"
    assert s.settings.tolerance == 0.3 and s.settings.reference_group == "b"


def test_a_checks_figures_are_withheld_only_for_its_own_groups_hidden_counts() -> None:
    # Two-sample promises for a and c; c is small (its TPR counts are hidden), a is large.
    data = policy().model_dump(mode="json", by_alias=True, exclude_none=True)
    data["targets"]["groups"]["a"]["out_of_sample"] = {
        "n": 20000,
        "positives": 4000,
        "tp": 2790.5,
        "fp": 3010.25,
    }
    data["targets"]["groups"]["c"] = {
        "n": 400, "action_rate": 0.3, "tpr": 0.6, "fpr": 0.2,
        "out_of_sample": {"n": 400, "positives": 100, "tp": 60.0, "fp": 60.0},
    }  # fmt: skip
    s = snapshot(doc=PolicyDocument.model_validate(data))
    a_promise = check(s, "promise", "a", "action_rate")
    assert a_promise.estimate.value == pytest.approx(3000 / 10000)
    assert a_promise.evidence is not None
    c_promise = check(s, "promise", "c", "action_rate")
    assert c_promise.estimate.withheld == "small-cell"  # c's action count 8 is "<11"
