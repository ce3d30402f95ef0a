"""The console's report pages (audit role), on SQLite and PostgreSQL: the month's snapshot
as a page under the console's own policy, the cross-month view and the month bundle, each
against what the API serves for the same month."""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from datetime import UTC, datetime
from html.parser import HTMLParser

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from tests.helpers import bearer, make_request
from tests.log_helpers import seal
from tests.test_console import sign_in


class _Rows(HTMLParser):
    """Every table row of a page as the list of its cells' text."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self._cell: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append(" ".join("".join(self._cell).split()))
            self._cell = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)


def rows_of(html: str) -> list[list[str]]:
    parser = _Rows()
    parser.feed(html)
    return parser.rows


def _p(value: float | None) -> str:
    # Four decimals, "<0.0001" below (the report's own convention, docs/console.md).
    if value is None:
        return "\u2013"
    return "<0.0001" if value < 1e-4 else f"{value:.4f}"


@pytest.fixture
def month(client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]) -> str:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    scoring = bearer(tokens["scoring"])
    now = datetime.now(UTC).isoformat()
    for i in range(150):
        region = ("north", "south", "east")[i % 3]
        body = make_request(score=(i % 20) / 20 + 0.025, attributes={"region": region})
        r = client.post("/v1/recommendations", json=body, headers=scoring)
        assert r.status_code == 201, r.text
        outcome = {
            "recommendation_id": r.json()["recommendation_id"],
            "outcome": int(i % 20 >= 8),
            "source": "records",
            "observed_at": now,
        }
        assert client.post("/v1/outcomes", json=outcome, headers=scoring).status_code == 201
    when = datetime.now(UTC).strftime("%Y-%m")
    body = {"policy": "readmission", "month": when, "provisional": True}
    r = client.post("/v1/audits", json=body, headers=bearer(tokens["audit"]))
    assert r.status_code == 201, r.text
    return when


def test_the_month_page_shows_every_check_of_the_snapshot(
    client: TestClient, tokens: dict[str, str], month: str
) -> None:
    snapshot = client.get(
        f"/v1/reports/readmission/{month}", headers=bearer(tokens["audit"])
    ).json()
    sign_in(client, tokens["audit"])
    page = client.get(f"/console/reports/readmission/{month}")
    assert page.status_code == 200, page.text
    # The console's own policy: no inline style, no script.
    assert "unsafe-inline" not in page.headers["content-security-policy"]
    assert "style=" not in page.text and "<script" not in page.text
    rows = rows_of(page.text)
    checks = [c for v in snapshot["versions"] for c in v["checks"]]
    assert checks, "the fixture's policy has targets: its audit must test something"
    # Not vacuous: some checks carry a figure and p-values (the rest are withheld).
    assert any(c["estimate"]["value"] is not None for c in checks)
    assert any(c["evidence"] is not None for c in checks)
    table = [r for r in rows if len(r) == 11 and r[0] != "Group" and ":" in r[1]]
    assert len(table) == len(checks)
    for row, c in zip(table, checks, strict=True):
        e = c["estimate"]
        signed = "+" if c["check"] == "parity" else ""
        assert row[0] == c["group"] and row[2] == c["against"] and row[10] == c["status"]
        if e["value"] is not None:
            assert row[3] == f"{e['value']:{signed}.3f}"
            assert f"{e['low']:{signed}.3f}" in row[4] and f"{e['high']:{signed}.3f}" in row[4]
        ev = c["evidence"]
        if ev is not None:
            assert row[6:10] == [
                _p(ev["p_outside"]),
                _p(ev["p_outside_adjusted"]),
                _p(ev["p_inside"]),
                _p(ev["p_inside_adjusted"]),
            ]
    maturity = snapshot["maturity"]
    assert ["State", f"{maturity['state']} {maturity['reason']}"] in rows
    assert ["Outcomes observed", f"{maturity['observed']:,}"] in rows
    for kind in ("report.json", "report.csv", "report.html", "bundle.ehb"):
        assert f"/console/reports/readmission/{month}/{kind}" in page.text
    # The month list links the page.
    listing = client.get("/console/reports/readmission")
    assert f'href="/console/reports/readmission/{month}"' in listing.text


def test_the_cross_month_view_matches_the_api_history(
    client: TestClient, tokens: dict[str, str], month: str
) -> None:
    api = client.get(
        "/v1/reports/readmission/history",
        params={"from": month, "to": month},
        headers=bearer(tokens["audit"]),
    ).json()
    sign_in(client, tokens["audit"])
    page = client.get("/console/reports/readmission/history")
    assert page.status_code == 200, page.text
    assert "style=" not in page.text and "<script" not in page.text
    lines = [r for r in rows_of(page.text) if len(r) == 7 and r[0] == month]
    assert len(lines) == len(api["rows"])
    shown = Counter((r[2], r[3], r[5]) for r in lines)
    figures = 0
    for r in api["rows"]:
        e = r["estimate"]
        signed = "+" if r["check"] == "parity" else ""
        if e["value"] is None:
            continue
        figures += 1
        key = (str(r["version"]), f"{e['value']:{signed}.3f}", r["status"] or "\u2013")
        assert shown[key] > 0, key
        shown[key] -= 1
    assert figures > 0
    # A range the view refuses is the service's own 422.
    bad = client.get("/console/reports/readmission/history", params={"since": "2026-13"})
    assert bad.status_code == 422


def test_the_month_bundle_is_the_apis_file(
    client: TestClient,
    tokens: dict[str, str],
    month: str,
    session_factory: sessionmaker[Session],
) -> None:
    sign_in(client, tokens["audit"])
    url = f"/console/reports/readmission/{month}/bundle.ehb"
    early = client.get(url)
    assert early.status_code == 422 and "not sealed" in early.text.lower()
    seal(session_factory)
    mine = client.get(url)
    params = {"policy": "readmission", "month": month}
    api = client.get("/v1/log/bundle", params=params, headers=bearer(tokens["audit"]))
    assert mine.status_code == 200 and api.status_code == 200
    assert mine.content == api.content and len(mine.content) > 0
    assert mine.headers["content-disposition"] == api.headers["content-disposition"]
    assert mine.headers["x-frame-options"] == "DENY"


def test_report_pages_are_for_the_audit_role(
    client: TestClient, tokens: dict[str, str], month: str
) -> None:
    sign_in(client, tokens["admin"])
    for url in (
        f"/console/reports/readmission/{month}",
        "/console/reports/readmission/history",
        f"/console/reports/readmission/{month}/bundle.ehb",
    ):
        assert client.get(url).status_code == 403, url
