"""End to end on both databases: the score sums, calibration tests and rates under selective
labels of a month's report equal a direct computation on the rows the service wrote."""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from scipy.stats import norm
from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.audit.job import run_audit
from service.audit.month import Month
from service.stats.selective_labels import SelectiveCounts, selective_rates
from service.store.audit_models import OutcomeRecord
from service.store.models import Recommendation
from tests.audit_helpers import POLICY, audit_policy
from tests.helpers import bearer, make_request
from tests.test_audit_e2e import _replay

REGIONS = ["north", "south", "east"]


def _put_live(client: TestClient, make_key: Callable[..., str], doc: dict[str, Any]) -> None:
    author, approver = bearer(make_key("admin")), bearer(make_key("admin"))
    assert (
        client.post(f"/v1/policies/{POLICY}/versions", json=doc, headers=author).status_code == 201
    )
    r = client.post(f"/v1/policies/{POLICY}/versions/1/approve", headers=approver)
    assert r.status_code == 200, r.text
    r = client.post(
        f"/v1/policies/{POLICY}/activate",
        json={"version": 1, "reason": "go", "expected_current": None},
        headers=author,
    )
    assert r.status_code == 200, r.text


def _rows(session: Session) -> list[Any]:
    """Every recommendation with the outcome that counts: its latest outcome record."""
    r, o = Recommendation, OutcomeRecord
    latest = (
        select(o.recommendation_pk, func.max(o.id).label("id"))
        .group_by(o.recommendation_pk)
        .subquery()
    )
    return list(
        session.execute(
            select(r.group, r.score, r.probability, r.action, o.outcome)
            .outerjoin(latest, latest.c.recommendation_pk == r.id)
            .outerjoin(o, o.id == latest.c.id)
        )
    )


def test_score_sums_and_calibration_tests_equal_a_direct_computation(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    _put_live(client, make_key, audit_policy())
    rows = _replay(client, bearer(make_key("scoring")), 700, seed=17)
    month = Month.parse(rows[0]["issued_at"][:7])
    with session_factory() as session:
        run = run_audit(session, POLICY, month, provisional=True)
        direct = _rows(session)
        session.rollback()
    (version,) = run.result.internal.versions
    for g in version.groups:
        seen = [x for x in direct if x.group == g.group and x.outcome is not None]
        s = np.array([x.score for x in seen])
        y = np.array([x.outcome for x in seen], dtype=float)
        sums = g.score_sums
        assert sums is not None and sums.n == len(seen)
        assert sums.sum_y == y.sum()
        for got, want in (
            (sums.sum_p, s.sum()),
            (sums.sum_p2, (s**2).sum()),
            (sums.sum_p4, (s**4).sum()),
            (sums.sum_yp, (y * s).sum()),
            (sums.log_double, np.log1p(s).sum()),
            (sums.log_half, np.log1p(-s / 2).sum()),
        ):
            assert got == pytest.approx(want, rel=1e-12, abs=1e-9)
        assert (
            sums.bin_counts
            == np.bincount(np.minimum((s * 10).astype(int), 9), minlength=10).tolist()
        )
        # Spiegelhalter 1986 (Statistics in Medicine 5:421-433), written out row by row.
        z = ((y - s) * (1 - 2 * s)).sum() / math.sqrt(((1 - 2 * s) ** 2 * s * (1 - s)).sum())
        (cal,) = [c for c in version.calibration if c.group == g.group]
        if cal.spiegelhalter is not None:
            assert cal.spiegelhalter.statistic == pytest.approx(z, rel=1e-9)
            assert cal.spiegelhalter.p_value == pytest.approx(2 * norm.sf(abs(z)), rel=1e-9)
    # The replay draws outcomes with probability equal to the score: calibrated by
    # construction, so no group should be found to depart (Holm at 0.05).
    assert {c.status for c in version.calibration} <= {"no-evidence", "too-few"}


def test_rates_under_selective_labels_equal_a_direct_computation(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    doc = audit_policy(outcome_observed_after="action")
    doc["rules"]["north"] = {
        "steps": [{"from": 0.15, "probability": 0.4}, {"from": 0.45, "probability": 1.0}]
    }
    _put_live(client, make_key, doc)
    h = bearer(make_key("scoring"))
    rng = np.random.default_rng(23)
    n = 900
    region = rng.choice(3, size=n, p=[0.6, 0.3, 0.1])
    score = np.round(rng.beta(2, 5, size=n), 4)
    y_true = (rng.random(n) < score).astype(int)
    items = [
        make_request(
            case_id=f"sel-{i}", score=float(score[i]), attributes={"region": REGIONS[region[i]]}
        )
        for i in range(n)
    ]
    out: list[dict[str, Any]] = []
    for start in range(0, n, 300):
        r = client.post(
            "/v1/recommendations/batch", json={"items": items[start : start + 300]}, headers=h
        )
        assert r.status_code == 201, r.text
        out.extend(r.json()["items"])
    reports = [
        {
            "recommendation_id": row["recommendation_id"],
            "outcome": int(y),
            "observed_at": row["issued_at"],
            "source": "loans",
        }
        for row, y in zip(out, y_true, strict=True)
        if row["action"]  # outcomes are seen only after the action
    ]
    for start in range(0, len(reports), 300):
        r = client.post(
            "/v1/outcomes/batch", json={"items": reports[start : start + 300]}, headers=h
        )
        assert r.status_code == 201, r.text
    month = Month.parse(out[0]["issued_at"][:7])
    with session_factory() as session:
        run = run_audit(session, POLICY, month, provisional=True)
        direct = _rows(session)
        session.rollback()
    (version,) = run.result.internal.versions
    assert version.outcome_observed_after == "action"
    for g in version.groups:
        mine = [x for x in direct if x.group == g.group]
        want = selective_rates(
            SelectiveCounts.from_rows(
                [x.probability for x in mine],
                [int(x.action) for x in mine],
                [np.nan if x.outcome is None else x.outcome for x in mine],
                "action",
            )
        )
        assert g.partial_rates is not None
        for metric, rate in want.items():
            got = g.partial_rates[metric]
            assert got.kind == rate.kind, (g.group, metric)
            for a, b in ((got.value, rate.value), (got.low, rate.low), (got.high, rate.high)):
                assert (a is None and b is None) or a == pytest.approx(b, rel=1e-12), (
                    g.group,
                    metric,
                )
    north = next(g for g in version.groups if g.group == "north")
    assert north.partial_rates is not None
    # north randomizes between 0.15 and 0.45: its unseen band cases are weighted, and cases
    # below 0.15 are never seen, so the prevalence is bounded, not a point.
    assert north.partial_rates["prevalence"].kind == "bounds"
    assert north.partial_rates["ppv"].kind == "identified"
