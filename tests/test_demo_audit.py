"""The demo's closing stages: outcomes over HTTP, the month's audit, the saved report."""

from __future__ import annotations

import io
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import create_engine, func, select
from sqlalchemy.orm import Session

from service.audit.month import Month
from service.audit.reports import get_snapshot
from service.demo.audit_stages import alert_summary, full_stages
from service.demo.context import DemoContext
from service.demo.story import run_demo
from service.store.audit_models import OutcomeRecord


@pytest.mark.slow
def test_demo_ends_with_a_report(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    ctx = run_demo(DemoContext(output_dir=tmp_path / "demo-output", cases=80), full_stages())
    out = capsys.readouterr().out
    assert "Audit of " in out and ("alert(s)" in out or "no alerts" in out)
    (html,) = (tmp_path / "demo-output").glob("report-*.html")
    (csv,) = (tmp_path / "demo-output").glob("report-*.csv")
    assert str(html.resolve()) in out
    assert "<svg" in html.read_text(encoding="utf-8")
    df = pd.read_csv(io.StringIO(csv.read_text(encoding="utf-8")), keep_default_na=False)
    month = df.month.iloc[0]
    engine = create_engine(ctx.database_url)
    with Session(engine) as session:
        snapshot = get_snapshot(session, ctx.policy_name, Month.parse(month))
        outcomes = session.scalar(
            select(func.count(func.distinct(OutcomeRecord.recommendation_pk)))
        )
    engine.dispose()
    # Every recommendation of the demo was issued in the audited month, which has not ended:
    # its outcome checks are decided provisionally, and the report says so.
    assert snapshot.row_counts["recommendations"] == len(ctx.sent) == 80
    assert snapshot.row_counts["outcomes"] == outcomes
    assert snapshot.maturity.outcome_checks == "decided provisionally"
    assert 0 < outcomes < 80  # some patients are lost to follow-up


def test_the_summary_tells_the_most_serious_alerts_and_counts_the_rest() -> None:
    alerts = [
        {"level": "watch", "version": 1, "message": "a"},
        {"level": "breach", "version": 1, "message": "b"},
        {"level": "breach", "version": 2, "message": "c"},
        {"level": "watch", "version": 2, "message": "d"},
    ]
    lines = alert_summary(alerts, shown=2)
    assert lines == [
        "4 alert(s): 2 breach, 2 watch",
        "  [breach] v1 b",
        "  [breach] v2 c",
        "  ... and 2 more, each listed in the report",
    ]
    assert alert_summary([]) == ["no alerts: no check shows a breach"]
    assert len(alert_summary(alerts)) == 5  # all four fit under the default
