"""When a month's outcomes are complete enough to decide outcome-based checks."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from service.audit.maturity import month_maturity
from service.audit.realized import CellCounts
from service.policy.document import AuditPlan

END = datetime(2026, 11, 1, tzinfo=UTC)
PLAN = AuditPlan(maturity_share=0.9, maturity_days=60)
DEADLINE = END + timedelta(days=60)


def cell(n: int, actions: int, observed: int) -> CellCounts:
    return CellCounts(n=n, actions=actions, observed=observed, positives=0)


def test_a_month_in_progress_is_provisional_whatever_its_coverage() -> None:
    m = month_maturity([(cell(100, 40, 100), "both")], PLAN, END, DEADLINE, END - timedelta(1))
    assert not m.mature and "not ended" in m.reason


def test_coverage_makes_a_month_mature() -> None:
    now = END + timedelta(days=35)
    assert month_maturity([(cell(100, 40, 90), "both")], PLAN, END, DEADLINE, now).mature
    m = month_maturity([(cell(100, 40, 89), "both")], PLAN, END, DEADLINE, now)
    assert not m.mature and m.share == 0.89 and "2026-12-31" in m.reason


def test_the_waiting_period_makes_a_month_mature() -> None:
    m = month_maturity([(cell(100, 40, 10), "both")], PLAN, END, DEADLINE, DEADLINE)
    assert m.mature and "60 days" in m.reason


def test_selective_labels_count_only_observable_decisions() -> None:
    # Outcomes seen only after the action: 40 observable, 38 observed (95%).
    now = END + timedelta(days=35)
    m = month_maturity([(cell(100, 40, 38), "action")], PLAN, END, DEADLINE, now)
    assert m.mature and (m.observable, m.observed) == (40, 38)
    m = month_maturity([(cell(100, 40, 50), "no-action")], PLAN, END, DEADLINE, now)
    assert (m.observable, m.observed) == (60, 50) and not m.mature
