"""Statuses and the snapshot built from counts: alerts, suppression, digest."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import pytest

from service.audit.snapshot import (
    CALIBRATION_CONFLICT,
    AuditInput,
    VersionCounts,
    build_snapshot,
    digest,
)
from service.policy.document import PolicyDocument
from service.audit.realized import CellCounts, ShadowCounts
from service.policy.statuses import Status, classify, four_fifths_status
from service.stats.proportions import newcombe_difference_interval


@pytest.mark.parametrize(
    ("point", "low", "high", "status"),
    [
        (0.01, -0.02, 0.04, Status.HOLDS),
        (0.05, -0.05, 0.05, Status.HOLDS),  # the tolerance itself is within
        (0.10, 0.06, 0.14, Status.BREACH),
        (-0.10, -0.14, -0.06, Status.BREACH),
        (0.07, 0.01, 0.13, Status.WATCH),
        (0.02, -0.04, 0.08, Status.UNSETTLED),
    ],
)
def test_classify(point: float, low: float, high: float, status: Status) -> None:
    assert classify(point, low, high, 0.05) is status


def test_four_fifths_status() -> None:
    assert four_fifths_status(False, -0.3) is Status.HOLDS
    assert four_fifths_status(True, -0.01) is Status.BREACH
    assert four_fifths_status(True, 0.02) is Status.WATCH


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
                "groups": {"a": {"action_rate": 0.3, "tpr": 0.7, "fpr": 0.2}},
            },
        }
    )


CELLS = {
    "a": CellCounts(n=1000, actions=300, observed=900, positives=200, tp=140, fp=150),
    "b": CellCounts(n=500, actions=200, observed=450, positives=100, tp=55, fp=140),
    "c": CellCounts(n=30, actions=8, observed=30, positives=9, tp=5, fp=3),
}


def snapshot(cells: dict[str, CellCounts] = CELLS, **kw: Any) -> Any:
    doc = kw.pop("doc", policy())
    return build_snapshot(
        AuditInput(
            policy="fernhollow",
            month="2026-10",
            time_zone="UTC",
            cohort_from=datetime(2026, 10, 1, tzinfo=UTC),
            cohort_until=datetime(2026, 11, 1, tzinfo=UTC),
            created_at=datetime(2026, 11, 2, tzinfo=UTC),
            code_version="test",
            versions=[VersionCounts(1, doc, cells, kw.pop("shadows", {}))],
            **kw,
        )
    )


def check(s: Any, kind: str, group: str, metric: str) -> dict[str, Any]:
    found = [
        c
        for c in s["versions"][0]["checks"]
        if (c["check"], c["group"], c["metric"]) == (kind, group, metric)
    ]
    assert len(found) == 1
    return found[0]


def test_parity_check_uses_newcombe_gap_to_the_largest_group() -> None:
    s = snapshot()
    v = s["versions"][0]
    assert v["reference_group"] == "a"
    c = check(s, "parity", "b", "tpr")
    lo, hi = newcombe_difference_interval(55, 100, 140, 200)
    assert (c["value"], c["low"], c["high"]) == pytest.approx((0.55 - 0.7, lo, hi))
    assert c["status"] == classify(0.55 - 0.7, lo, hi, 0.05)


def test_small_cells_are_suppressed_but_statuses_use_true_values() -> None:
    s = snapshot()
    c_group = next(g for g in s["versions"][0]["groups"] if g["group"] == "c")
    assert c_group["counts"]["tp"] == "<11"
    assert c_group["counts"]["tn"] is None  # 30 - ... would give the small counts back
    assert c_group["rates"]["tpr"]["withheld"] == "small-cell"
    assert c_group["rates"]["tpr"]["value"] is None
    # c has 30 cases: the four-fifths check is decided on its true 8/30 against b's 200/500.
    ff = check(s, "four-fifths", "c", "four_fifths_ratio")
    assert ff["status"] in {"watch", "breach"} and ff["flagged"] is True
    assert ff["ratio"] is None
    # 9 positives: below the minimum count, so the TPR check is "too few".
    assert check(s, "parity", "c", "tpr")["status"] == "too-few"


def test_alerts_are_sorted_by_severity() -> None:
    s = snapshot()
    order = [a["status"] for a in s["alerts"]]
    rank = {"breach": 0, "watch": 1, "too-few": 2, "not-identifiable": 3}
    assert order == sorted(order, key=rank.__getitem__)
    assert "holds" not in order


def test_selective_labels_give_not_identifiable_checks() -> None:
    s = snapshot(doc=policy(observed_after="action"))
    assert check(s, "parity", "b", "tpr")["status"] == "not-identifiable"
    assert check(s, "promise", "a", "fpr")["status"] == "not-identifiable"
    a = s["versions"][0]["groups"][0]
    assert a["rates"]["tpr"]["withheld"] == "not-identifiable"
    assert CALIBRATION_CONFLICT not in s["cautions"]
    assert CALIBRATION_CONFLICT in snapshot()["cautions"]


def test_digest_covers_the_content() -> None:
    s = snapshot()
    assert s["digest"] == digest(s)
    s2 = dict(s, month="2026-11")
    assert digest(s2) != s["digest"]


def test_shadow_rates() -> None:
    shadow = {2: {"a": ShadowCounts(1000, 320, 40, 900, 200, 150, 160)}}
    s = snapshot(shadows=shadow)
    sg = s["versions"][0]["shadows"][0]["groups"][0]
    assert sg["counts"]["differs"] == 40
    assert sg["rates"]["tpr"]["value"] == pytest.approx(0.75)
    assert sg["rates"]["differ_rate"]["value"] == pytest.approx(0.04)


def test_trend_takes_earlier_months() -> None:
    earlier = snapshot()
    earlier["month"] = "2026-09"
    s = snapshot(history=[earlier])
    months = {p["month"] for p in s["trend"]}
    assert months == {"2026-09", "2026-10"}


def test_auditor_tolerance_overrides_the_version() -> None:
    assert check(snapshot(), "parity", "b", "tpr")["status"] == "watch"  # version: 0.05
    s = snapshot(tolerance=0.3)
    assert s["versions"][0]["tolerance"] == 0.3
    assert s["versions"][0]["policy_tolerance"] == 0.05
    assert check(s, "parity", "b", "tpr")["status"] == "holds"
