"""The month page's group rates (table and charts) and the cross-month charts, against the
JSON the API serves for the same month (SQLite and PostgreSQL).

Each drawn point is read back into a value through the chart's own axis: two tick labels
(exact values) and their pixel positions give the linear map, so a point's ``cy`` and its
whisker's ends must come back to the snapshot's estimate and interval ends (to a thousandth:
coordinates are written to 0.01 px).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from html.parser import HTMLParser
from typing import Any

from fastapi.testclient import TestClient

from tests.helpers import bearer
from tests.test_console import sign_in
from tests.test_console_reports import month, rows_of  # noqa: F401  (month: a fixture)

TOLERANCE = 1e-3


@dataclass
class Drawn:
    """One SVG chart as drawn: its y ticks and, per category, the point and whisker."""

    name: str
    title: str = ""
    ticks: list[tuple[float, float]] = field(default_factory=list)  # (pixel y, value)
    points: dict[str, dict[str, Any]] = field(default_factory=dict)

    def value(self, y: float) -> float:
        (y0, v0), (y1, v1) = self.ticks[0], self.ticks[-1]
        return v0 + (y - y0) * (v1 - v0) / (y1 - y0)


class _Charts(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.charts: list[Drawn] = []
        self._tick_y: float | None = None
        self._key: str | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        if tag == "svg" and "data-chart" in a:
            self.charts.append(Drawn(a["data-chart"], a.get("aria-label", "")))
        elif not self.charts:
            return
        elif tag == "text" and "data-y" in a:
            self._tick_y = float(a["data-y"])
        elif tag == "g" and "data-key" in a:
            self._key = a["data-key"]
            self.charts[-1].points[self._key] = {"signal": "signal" in a["class"].split()}
        elif tag == "circle" and self._key is not None:
            self.charts[-1].points[self._key]["cy"] = float(a["cy"])
        elif (
            tag == "line"
            and self._key is not None
            and "y_low" not in self.charts[-1].points[self._key]
        ):
            point = self.charts[-1].points[self._key]
            point["y_low"], point["y_high"] = float(a["y1"]), float(a["y2"])

    def handle_endtag(self, tag: str) -> None:
        if tag == "g":
            self._key = None
        elif tag == "text":
            self._tick_y = None

    def handle_data(self, data: str) -> None:
        if self._tick_y is not None and data.strip():
            self.charts[-1].ticks.append((self._tick_y, float(data)))


def charts_of(html: str) -> list[Drawn]:
    parser = _Charts()
    parser.feed(html)
    return parser.charts


def _close(a: float, b: float) -> bool:
    return abs(a - b) <= TOLERANCE


def test_the_group_rates_table_and_charts_match_the_snapshot(
    client: TestClient,
    tokens: dict[str, str],
    month: str,  # noqa: F811
) -> None:
    snapshot = client.get(
        f"/v1/reports/readmission/{month}", headers=bearer(tokens["audit"])
    ).json()
    sign_in(client, tokens["audit"])
    page = client.get(f"/console/reports/readmission/{month}")
    assert page.status_code == 200, page.text
    assert "style=" not in page.text and "<script" not in page.text
    rows = rows_of(page.text)
    drawn = {c.name: c for c in charts_of(page.text)}
    metrics = ("action_rate", "coverage", "prevalence", "tpr", "fpr", "fnr", "ppv", "npv")
    points = 0
    for v in snapshot["versions"]:
        for g in v["groups"]:
            # The table: the group's row, every rate "estimate (low to high)" or withheld.
            row = next(r for r in rows if r and r[0].split(" (")[0] == g["group"] and len(r) == 11)
            assert row[1] == f"{g['counts']['n']:,}"
            for cell, metric in zip(row[3:], metrics, strict=True):
                e = g["rates"][metric]
                if e["value"] is None:
                    assert "withheld" in cell or cell in ("not identifiable", "no cases", "pending")
                else:
                    assert cell == f"{e['value']:.3f} ({e['low']:.3f} \u2013 {e['high']:.3f})"
        for metric in ("action_rate", "coverage", "tpr", "fpr", "ppv", "npv"):
            estimates = {g["group"]: g["rates"][metric] for g in v["groups"]}
            if all(e["value"] is None for e in estimates.values()):
                assert f"v{v['version']}-{metric}" not in drawn
                continue
            chart = drawn[f"v{v['version']}-{metric}"]
            assert chart.ticks[0][1] == 0 and chart.ticks[-1][1] == 1  # a rate's whole range
            for group, e in estimates.items():
                if e["value"] is None:
                    assert group not in chart.points
                    continue
                p = chart.points[group]
                assert _close(chart.value(p["cy"]), e["value"]), (metric, group)
                assert _close(chart.value(p["y_low"]), e["low"]), (metric, group)
                assert _close(chart.value(p["y_high"]), e["high"]), (metric, group)
                points += 1
    assert points >= 6  # not vacuous: the fixture's groups have rates


def test_the_cross_month_charts_match_the_api_history(
    client: TestClient,
    tokens: dict[str, str],
    month: str,  # noqa: F811
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
    charts = [c for c in charts_of(page.text) if c.name.startswith("history-")]
    # One chart per group and check, named for them; its points are the API's estimates.
    expected: dict[tuple[str, str, str, str], list[dict[str, Any]]] = {}
    for r in api["rows"]:
        expected.setdefault((r["group"], r["check"], r["metric"], r["against"]), []).append(r)
    assert len(charts) == len(expected)
    drawn = 0
    for chart in charts:
        matches = [
            rows
            for (group, check, _metric, against), rows in expected.items()
            if chart.title.startswith(f"{check}: ")
            and f" of group {group}" in chart.title
            and (not against or f" against {against}," in chart.title)
        ]
        assert matches, chart.title
        candidates = []
        for rows in matches:
            ok = True
            for r in rows:
                e = r["estimate"]
                p = chart.points.get(r["month"])
                if e["value"] is None:
                    ok = ok and p is None
                    continue
                ok = (
                    ok
                    and p is not None
                    and _close(chart.value(p["cy"]), e["value"])
                    and _close(chart.value(p["y_low"]), e["low"])
                    and _close(chart.value(p["y_high"]), e["high"])
                    and p["signal"] == bool(r["chart"] and r["chart"]["signal"])
                )
            candidates.append(ok)
        assert any(candidates), chart.title
        drawn += len(chart.points)
    assert drawn > 0


def test_the_value_axis_holds_every_interval_between_exact_ticks() -> None:
    from service.console.interval_chart import Figure, interval_chart, value_range

    # Worked by hand: -0.269..0.069 needs steps of 0.1 from -0.3 to 0.1 (4 intervals).
    assert value_range([-0.269, 0.0], [0.069, 0.0]) == (-0.3, 0.1, 0.1)
    assert value_range([0.0], [1.0]) == (0.0, 1.0, 0.2)
    chart = interval_chart(
        "t",
        [Figure("a", 1.7, 1.2, 2.4, "a"), Figure("b", None, None, None, "b", "withheld")],
        0.0,
        1.0,
        reference=(0.8, "four-fifths"),
    )
    values = [float(t.label) for t in chart.y_ticks]
    assert values[0] <= 0.0 and values[-1] >= 2.4
    assert [p.key for p in chart.points] == ["a"] and chart.notes[0].text == "withheld"
    drawn = Drawn("t", ticks=[(t.position, float(t.label)) for t in chart.y_ticks])
    point = chart.points[0]
    assert _close(drawn.value(point.y), 1.7) and _close(drawn.value(point.y_high), 2.4)
    assert chart.reference is not None and _close(drawn.value(chart.reference.position), 0.8)
