"""End to end over months, on both databases: a policy derived on calibration data and served
over HTTP to fresh cases from the same distribution shows no breach; a slow drift in one
group's outcomes is flagged by the monitoring before any single month shows a breach, and a
sudden shift is a breach found and named.

The service stamps each decision with the time it was made; to play several months in a few
seconds the test moves the scoring clock (``service.store.decision_pipeline.utcnow``) to the
middle of each month, and audits each month as if two months had passed since it ended.
"""

from __future__ import annotations

import csv
import json
from collections.abc import Callable
from datetime import timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.audit.job import run_audit
from service.audit.month import Month
from service.audit.snapshot import AuditResult
from service.cli.main import main
from tests.helpers import bearer

POLICY = "readmission"
GROUPS = ("north", "south", "east")
SHARES = (0.55, 0.3, 0.15)
BETA = {"north": (2.0, 6.0), "south": (2.5, 5.0), "east": (2.0, 4.0)}
FIRST = Month.parse("2025-01")


def cases(rng: np.random.Generator, n: int) -> tuple[list[str], np.ndarray]:
    region = rng.choice(len(GROUPS), size=n, p=SHARES)
    groups = [GROUPS[i] for i in region]
    score = np.array([rng.beta(*BETA[g]) for g in groups]).round(4)
    return groups, score


def outcomes(
    rng: np.random.Generator, groups: list[str], score: np.ndarray, shift: float
) -> np.ndarray:
    """Outcomes with probability equal to the score (a calibrated model), except that in
    ``south`` cases scored below 0.25 have the outcome ``shift`` more often: the positives the
    rule does not act on grow, so south's TPR falls."""
    p = score.copy()
    south = np.array([g == "south" for g in groups])
    low = south & (score < 0.25)
    p[low] = np.minimum(1.0, p[low] + shift)
    return (rng.random(len(p)) < p).astype(int)


def derive_policy(tmp_path: Path) -> dict[str, Any]:
    rng = np.random.default_rng(2025)
    groups, score = cases(rng, 30_000)
    y = outcomes(rng, groups, score, 0.0)
    path = tmp_path / "calibration.csv"
    with path.open("w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["region", "score", "readmitted"])
        w.writerows(zip(groups, score.tolist(), y.tolist(), strict=True))
    out, report = tmp_path / "policy.json", tmp_path / "report.json"
    argv = [
        "derive", str(path), "--score", "score", "--outcome", "readmitted", "--group", "region",
        "--criterion", "equal-opportunity", "--cost-fp", "1", "--cost-fn", "4",
        "--tolerance", "0.05", "--name", POLICY, "--out", str(out), "--report", str(report),
    ]  # fmt: skip
    assert main(argv) == 0
    return dict(json.loads(out.read_text()))


def put_live(client: TestClient, make_key: Callable[..., str], doc: dict[str, Any]) -> None:
    author, approver = bearer(make_key("admin")), bearer(make_key("admin"))
    r = client.post(f"/v1/policies/{POLICY}/versions", json=doc, headers=author)
    assert r.status_code == 201, r.text
    r = client.post(f"/v1/policies/{POLICY}/versions/1/approve", headers=approver)
    assert r.status_code == 200, r.text
    body = {"version": 1, "expected_current": None}
    r = client.post(f"/v1/policies/{POLICY}/activate", json=body, headers=author)
    assert r.status_code == 200, r.text


def play_month(
    client: TestClient,
    h: dict[str, str],
    monkeypatch: pytest.MonkeyPatch,
    rng: np.random.Generator,
    month: Month,
    n: int,
    shift: float,
) -> None:
    """Score ``n`` cases in the middle of ``month`` and report every outcome."""
    start, _ = month.bounds("UTC")
    monkeypatch.setattr(
        "service.store.decision_pipeline.utcnow", lambda: start + timedelta(days=14)
    )
    groups, score = cases(rng, n)
    y = outcomes(rng, groups, score, shift)
    decided: list[dict[str, Any]] = []
    for at in range(0, n, 500):
        items = [
            {
                "request_id": f"{month}-{i}",
                "case_id": f"{month}-c{i}",
                "policy": POLICY,
                "score": float(score[i]),
                "attributes": {"region": groups[i]},
            }
            for i in range(at, min(n, at + 500))
        ]
        r = client.post("/v1/recommendations/batch", json={"items": items}, headers=h)
        assert r.status_code == 201, r.text
        decided.extend(r.json()["items"])
    observed = (start + timedelta(days=45)).isoformat()
    reports = [
        {"recommendation_id": d["recommendation_id"], "outcome": int(yi), "observed_at": observed,
         "source": "records"}
        for d, yi in zip(decided, y, strict=True)
    ]  # fmt: skip
    for at in range(0, len(reports), 500):
        r = client.post("/v1/outcomes/batch", json={"items": reports[at : at + 500]}, headers=h)
        assert r.status_code == 201, r.text


def audit(session_factory: sessionmaker[Session], month: Month) -> AuditResult:
    now = month.bounds("UTC")[1] + timedelta(days=61)
    with session_factory() as session:
        run = run_audit(session, POLICY, month, now=now)
        session.commit()
    return run.result


@pytest.mark.slow
def test_a_slow_drift_is_flagged_by_the_charts_before_any_month_breaches(
    client: TestClient,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
) -> None:
    put_live(client, make_key, derive_policy(tmp_path))
    h = bearer(make_key("scoring"))
    rng = np.random.default_rng(7)
    first_signal: Month | None = None
    # Two years: the charts' limits hold their false-alarm rate over every year of use (designed
    # over 36 months), so a drift this slow takes more than a year to cross them.
    for i in range(24):
        month = FIRST.shifted(i)
        # No drift for three months, then south's low-score outcomes creep up.
        shift = 0.0 if i < 3 else min(0.12, 0.03 * (i - 2))
        play_month(client, h, monkeypatch, rng, month, 900, shift)
        snapshot = audit(session_factory, month).published
        assert snapshot.maturity.state == "mature"
        breaches = [a for a in snapshot.alerts if a.level == "breach"]
        watches = [a for a in snapshot.alerts if a.level == "watch"]
        if first_signal is None:
            # Until the charts speak, no single month may show a breach.
            assert not breaches, (str(month), [a.message for a in breaches])
            if watches:
                first_signal = month
                # The charts that speak are south's: its TPR gap or its outcomes against scores.
                assert {a.group for a in watches} == {"south"}, watches
                break
    assert first_signal is not None, "the drift was never flagged"
    assert first_signal > FIRST.shifted(3)  # not before the drift began


@pytest.mark.slow
def test_in_control_months_show_no_breach_and_a_shift_is_found_and_named(
    client: TestClient,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
) -> None:
    put_live(client, make_key, derive_policy(tmp_path))
    h = bearer(make_key("scoring"))
    rng = np.random.default_rng(11)
    for i in range(2):
        play_month(client, h, monkeypatch, rng, FIRST.shifted(i), 1500, 0.0)
        result = audit(session_factory, FIRST.shifted(i))
        snapshot = result.published
        assert not [a for a in snapshot.alerts if a.level == "breach"], snapshot.alerts
        tested = [c for v in result.internal.versions for c in v.checks if c.evidence]
        assert len(tested) == snapshot.family.tests > 0
    shifted = FIRST.shifted(2)
    play_month(client, h, monkeypatch, rng, shifted, 3000, 0.4)
    snapshot = audit(session_factory, shifted).published
    breaches = [a for a in snapshot.alerts if a.level == "breach"]
    assert ("parity", "tpr", "south") in {(a.check, a.metric, a.group) for a in breaches}
    assert all(a.group == "south" for a in breaches), [a.message for a in breaches]
    (named,) = [a for a in breaches if a.check == "parity"]
    assert "TPR gap of south" in named.message and "breach" in named.message


def test_cross_month_view_and_daily_warnings_over_the_api_and_the_cli(
    client: TestClient,
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
    database_url: str,
    capsys: pytest.CaptureFixture[str],
) -> None:
    put_live(client, make_key, derive_policy(tmp_path))
    h = bearer(make_key("scoring"))
    audit_key = bearer(make_key("audit"))
    rng = np.random.default_rng(3)
    for i in range(3):
        play_month(client, h, monkeypatch, rng, FIRST.shifted(i), 600, 0.0)
        audit(session_factory, FIRST.shifted(i))
    r = client.get(f"/v1/reports/{POLICY}/history?from=2024-12&to=2025-03", headers=audit_key)
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["months"] == ["2025-01", "2025-02", "2025-03"]
    south = [x for x in body["rows"] if x["group"] == "south" and x["check"] == "parity"]
    assert [x["month"] for x in south] == body["months"]
    assert all(x["chart"] is not None and x["chart"]["above_limit"] > 0 for x in south)
    r = client.get(
        f"/v1/reports/{POLICY}/history?from=2025-01&to=2025-03&format=csv", headers=audit_key
    )
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    assert r.text.splitlines()[0].startswith("month,maturity,version,check")
    bad = client.get(f"/v1/reports/{POLICY}/history?from=2025-03&to=2025-01", headers=audit_key)
    assert bad.status_code == 422 and bad.json()["error"]["field"] == "from"

    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    argv = ["report", "history", "--policy", POLICY, "--from", "2025-01", "--to", "2025-03"]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "2025-02" in out and "south" in out and "in control" in out

    # The day every case of February was decided: a day of fresh cases from the calibration
    # distribution raises no drift warning.
    r = client.get(f"/v1/warnings/{POLICY}?day=2025-02-15", headers=audit_key)
    assert r.status_code == 200, r.text
    day = r.json()
    assert day["day"] == "2025-02-15" and day["warnings"] == 0
    assert {d["status"] for d in day["drift"]} <= {"no-evidence", "too-few"}
    assert client.get(f"/v1/warnings/{POLICY}?day=2025-02-30", headers=audit_key).status_code == 422
    assert main(["warnings", "--policy", POLICY, "--day", "2025-02-15"]) == 0
    assert "0 warning(s)" in capsys.readouterr().out
