"""The console's month list (audit role), on SQLite and PostgreSQL: per month, maturity and
the number of checks with each status, against the snapshot JSON the API serves."""

from __future__ import annotations

import re
from collections import Counter

from fastapi.testclient import TestClient

from tests.helpers import bearer
from tests.test_console import sign_in
from tests.test_console_reports import month, rows_of

__all__ = ["month"]  # the fixture: a month with 150 decisions, outcomes and an audit


def test_the_month_list_counts_each_status_of_the_months_checks(
    client: TestClient, tokens: dict[str, str], month: str
) -> None:
    audit = bearer(tokens["audit"])
    snapshot = client.get(f"/v1/reports/readmission/{month}", headers=audit).json()
    statuses = Counter(c["status"] for v in snapshot["versions"] for c in v["checks"])
    assert sum(statuses.values()) > 0
    listing = client.get("/v1/reports/readmission", headers=audit).json()
    (entry,) = listing["months"]
    assert entry["snapshots"][0]["status_counts"] == dict(statuses)
    sign_in(client, tokens["audit"])
    page = client.get("/console/reports/readmission")
    assert page.status_code == 200
    shown = {
        status: int(n)
        for status, n in re.findall(
            r'<span data-status="([a-z-]+)">[a-z-]+ (\d+)</span>', page.text
        )
    }
    assert shown == dict(statuses)
    (row,) = [r for r in rows_of(page.text) if r and r[0] == month]
    assert row[2] == snapshot["maturity"]["state"]
    assert row[3] == ", ".join(f"{s} {n}" for s, n in shown.items())
    # A second run of the month: the row is the latest snapshot's.
    r = client.post(
        "/v1/audits",
        json={"policy": "readmission", "month": month, "provisional": True},
        headers=audit,
    )
    assert r.status_code == 201, r.text
    again = rows_of(client.get("/console/reports/readmission").text)
    (row,) = [r for r in again if r and r[0] == month]
    assert row[1] == "2" and row[3] == ", ".join(f"{s} {n}" for s, n in shown.items())
