"""End to end: cases scored and outcomes reported over HTTP, then audited; every count and rate
of the report equals a direct computation on the same rows."""

from __future__ import annotations

import io
from collections.abc import Callable
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker
from statsmodels.stats.proportion import proportion_confint

from service.audit.job import run_audit
from service.audit.month import Month
from service.audit.realized import RATE_FRACTIONS
from service.audit.snapshot_model import Snapshot
from service.stats.proportions import wilson_interval
from service.store.models import Recommendation
from tests.audit_helpers import POLICY, audit_policy, put_live
from tests.helpers import bearer, make_request

REGIONS = ["north", "south", "east"]
TALLIED = ["n", "actions", "observed", "positives", "tp", "fp", "finals", "overrides"]


def _shadow_doc() -> dict[str, Any]:
    doc = audit_policy()
    doc["rules"] = {**doc["rules"], "north": {"steps": [{"from": 0.22, "probability": 1.0}]}}
    return doc


def _replay(client: TestClient, h: dict[str, str], n: int, seed: int) -> list[dict[str, Any]]:
    """Score ``n`` synthetic cases and report outcomes for most of them; returns the rows."""
    rng = np.random.default_rng(seed)
    region = rng.choice(3, size=n, p=[0.55, 0.38, 0.07])
    score = np.round(rng.beta(2, 5, size=n), 4)
    y = (rng.random(n) < score).astype(int)
    rows: list[dict[str, Any]] = []
    for start in range(0, n, 250):
        items = [
            make_request(
                case_id=f"e2e-{i}",
                score=float(score[i]),
                attributes={"region": REGIONS[region[i]]},
            )
            for i in range(start, min(n, start + 250))
        ]
        r = client.post("/v1/recommendations/batch", json={"items": items}, headers=h)
        assert r.status_code == 201, r.text
        rows.extend(r.json()["items"])
    observed = rng.random(n) < 0.85
    for row, yi, seen in zip(rows, y, observed, strict=True):
        row["y_true"] = int(yi)
        row["y"] = int(yi) if seen else None
    # Observed and decided now: after the decisions, not in the future (the service refuses both).
    when = datetime.now().astimezone().isoformat()
    reports = [
        {"recommendation_id": row["recommendation_id"], "outcome": row["y"]}
        for row in rows
        if row["y"] is not None
    ]
    # Most in batches, a few one by one by (policy, case_id).
    singles, batched = reports[:15], reports[15:]
    for start in range(0, len(batched), 300):
        chunk = [
            {**x, "observed_at": when, "source": "records"} for x in batched[start : start + 300]
        ]
        r = client.post("/v1/outcomes/batch", json={"items": chunk}, headers=h)
        assert r.status_code == 201, r.text
    by_id = {row["recommendation_id"]: row for row in rows}
    for x in singles:
        case_id = by_id[x["recommendation_id"]]["case_id"]
        body = {"policy": POLICY, "case_id": case_id, "outcome": x["outcome"]}
        r = client.post(
            "/v1/outcomes", json={**body, "observed_at": when, "source": "ehr"}, headers=h
        )
        assert r.status_code == 201, r.text
    # Corrections: the latest value counts.
    for row in [r for r in rows if r["y"] is not None][:6]:
        row["y"] = 1 - row["y"]
        body = {
            "recommendation_id": row["recommendation_id"],
            "outcome": row["y"],
            "observed_at": when,
            "source": "records",
            "correction": {"reason": "re-coded after chart review"},
        }
        assert client.post("/v1/outcomes", json=body, headers=h).status_code == 201
    # Final decisions: every fifth followed, every seventeenth overridden.
    for i, row in enumerate(rows):
        row["final"] = None
        if i % 17 == 0:
            row["final"] = "overridden"
            body = {"decision": "overridden", "reason_code": "clinician", "decided_at": when}
        elif i % 5 == 0:
            row["final"] = "followed"
            body = {"decision": "followed", "decided_at": when}
        else:
            continue
        url = f"/v1/recommendations/{row['recommendation_id']}/final"
        assert client.post(url, json=body, headers=h).status_code == 201
    return rows


def _direct_counts(rows: list[dict[str, Any]]) -> dict[str, dict[str, int]]:
    """Tally the rows one by one in plain Python, group by group."""
    out: dict[str, dict[str, int]] = {}
    for row in rows:
        c = out.setdefault(
            row["group"],
            dict.fromkeys(
                ["n", "actions", "observed", "positives", "tp", "fp", "finals", "overrides"], 0
            ),
        )
        c["n"] += 1
        c["actions"] += row["action"]
        if row["y"] is not None:
            c["observed"] += 1
            c["positives"] += row["y"]
            c["tp"] += row["action"] and row["y"] == 1
            c["fp"] += row["action"] and row["y"] == 0
        if row["final"] is not None:
            c["finals"] += 1
            c["overrides"] += row["final"] == "overridden"
    for c in out.values():
        c["no_actions"] = c["n"] - c["actions"]
        c["unobserved"] = c["n"] - c["observed"]
        c["negatives"] = c["observed"] - c["positives"]
        c["fn"] = c["positives"] - c["tp"]
        c["tn"] = c["negatives"] - c["fp"]
        c["observed_actions"] = c["tp"] + c["fp"]
        c["observed_no_actions"] = c["fn"] + c["tn"]
        c["followed"] = c["finals"] - c["overrides"]
    return out


def test_report_equals_direct_computation(
    client: TestClient, make_key: Callable[..., str], session_factory: sessionmaker[Session]
) -> None:
    put_live(client, make_key, shadow=_shadow_doc())
    rows = _replay(client, bearer(make_key("scoring")), 900, seed=41)
    month = rows[0]["issued_at"][:7]
    start, end = Month.parse(month).bounds("UTC")
    in_month = [
        r for r in rows if start <= datetime.fromisoformat(r["issued_at"]) < end
    ]  # a run across midnight at month end splits the cohort
    direct = _direct_counts(in_month)

    audit = bearer(make_key("audit"))
    r = client.post("/v1/audits", json={"policy": POLICY, "month": month}, headers=audit)
    assert r.status_code == 201, r.text
    r = client.get(f"/v1/reports/{POLICY}/{month}", headers=audit)
    assert r.status_code == 200
    snap = r.json()
    typed = Snapshot.model_validate(snap)
    assert snap["digest"] == typed.computed_digest() == r.headers["X-Evenhand-Digest"]
    assert snap["view"] == "published"
    (version,) = snap["versions"]
    assert version["version"] == 1
    groups = {g["group"]: g for g in version["groups"]}
    assert set(groups) == set(direct)

    for name, g in groups.items():
        want = direct[name]
        for count, value in g["counts"].items():
            if isinstance(value, int):
                assert value == want[count], (name, count)
            elif value == "<11":
                assert 0 < want[count] < 11, (name, count)
            else:
                assert value is None  # complementary suppression
        for metric, (num, den) in RATE_FRACTIONS.items():
            pub = g["rates"][metric]
            if pub["value"] is None:
                assert pub["withheld"] in {"small-cell", "no-cases"}
                assert (
                    pub["withheld"] == "no-cases"
                    or min(want[num], want[den]) < 11
                    or any(not isinstance(g["counts"][x], int) for x in (num, den))
                )
                continue
            k, n = want[num], want[den]
            assert pub["value"] == k / n, (name, metric)
            assert (pub["low"], pub["high"]) == wilson_interval(k, n)
            # statsmodels proportion_confint(method="wilson") on the same k, n.
            assert (pub["low"], pub["high"]) == pytest.approx(
                proportion_confint(k, n, method="wilson"), abs=1e-12
            )

    # The internal view holds the true counts the statuses use, not only the published ones.
    r = client.get(f"/v1/reports/{POLICY}/{month}?view=internal", headers=audit)
    assert r.status_code == 200 and r.headers["X-Evenhand-View"] == "internal"
    internal = r.json()
    assert internal["view"] == "internal"
    for g in internal["versions"][0]["groups"]:
        assert g["counts"] == direct[g["group"]], g["group"]
        # Expected cost under the rule's probabilities on the same rows: c_FP = 1 for each
        # observed negative times P(action), c_FN = 4 for each observed positive times
        # P(no action) (audit_policy's costs), per case with an outcome.
        seen = [x for x in in_month if x["group"] == g["group"] and x["y"] is not None]
        expected = sum(
            x["probability"] if x["y"] == 0 else 4 * (1 - x["probability"]) for x in seen
        )
        assert g["cost_per_case"]["expected"] == pytest.approx(expected / len(seen), abs=1e-12)
    with session_factory() as session:
        run = run_audit(session, POLICY, Month.parse(month))
        session.rollback()
        shadow_rows = session.query(
            Recommendation.recommendation_id, Recommendation.shadow_action
        ).all()
    assert run.result.internal.row_counts["recommendations"] == len(in_month)

    # Shadow version 2 on the same rows.
    shadow_action = dict(shadow_rows)
    (shadow,) = version["shadows"]
    assert shadow["version"] == 2
    for sg in shadow["groups"]:
        dr = [r for r in in_month if r["group"] == sg["group"]]
        differs = sum(shadow_action[r["recommendation_id"]] != r["action"] for r in dr)
        acts = sum(bool(shadow_action[r["recommendation_id"]]) for r in dr)
        for key, want_value in (("n", len(dr)), ("differs", differs), ("actions", acts)):
            got = sg["counts"][key]
            if isinstance(got, int):
                assert got == want_value, (sg["group"], key)
            elif got == "<11":
                assert 0 < want_value < 11, (sg["group"], key)
            else:
                assert got is None  # complementary suppression
    north = next(s for s in shadow["groups"] if s["group"] == "north")
    assert north["counts"]["differs"] not in (0, None)

    # The CSV carries the same figures and loads into pandas.
    r = client.get(f"/v1/reports/{POLICY}/{month}.csv", headers=audit)
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    df = pd.read_csv(io.StringIO(r.text), keep_default_na=False, na_values=[""])
    north_n = df[(df.group == "north") & (df.kind == "count") & (df.metric == "n")]
    assert north_n.value.iloc[0] == direct["north"]["n"]
    r = client.get(f"/v1/reports/{POLICY}/{month}.html", headers=audit)
    assert r.status_code == 200 and "<svg" in r.text

    # A re-run makes a new snapshot; both are listed, the latest is served.
    r = client.post("/v1/audits", json={"policy": POLICY, "month": month}, headers=audit)
    assert r.status_code == 201
    listing = client.get(f"/v1/reports/{POLICY}", headers=audit).json()
    (entry,) = listing["months"]
    assert len(entry["snapshots"]) == 2
    latest = client.get(f"/v1/reports/{POLICY}/{month}", headers=audit).json()
    assert latest["digest"] == entry["snapshots"][0]["digest"] != snap["digest"]
    first_id = entry["snapshots"][1]["id"]
    older = client.get(f"/v1/reports/{POLICY}/{month}?snapshot={first_id}", headers=audit)
    assert older.json()["digest"] == snap["digest"]
