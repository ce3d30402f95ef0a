"""GET /metrics and the JSON request log: what a scrape shows after scoring requests, and
that a log line carries the request id but no attribute value, token or secret."""

from __future__ import annotations

import json
import logging
from collections.abc import Callable, Iterator

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy.orm import Session, sessionmaker

from service.observability.json_logs import JsonFormatter
from service.settings import Settings
from tests.conftest import TEST_SECRET
from tests.helpers import bearer, make_request
from tests.log_helpers import seal

Samples = dict[tuple[str, frozenset[tuple[str, str]]], float]
R = "/v1/recommendations"


def scrape(client: TestClient, token: str) -> Samples:
    r = client.get("/metrics", headers=bearer(token))
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/plain")
    return {
        (s.name, frozenset(s.labels.items())): s.value
        for family in text_string_to_metric_families(r.text)
        for s in family.samples
    }


def value(samples: Samples, name: str, **labels: str) -> float:
    return samples.get((name, frozenset(labels.items())), 0.0)


def test_metrics_need_an_audit_or_admin_key(client: TestClient, tokens: dict[str, str]) -> None:
    assert client.get("/metrics").status_code == 401
    assert client.get("/metrics", headers=bearer(tokens["scoring"])).status_code == 403
    assert client.get("/metrics", headers=bearer(tokens["audit"])).status_code == 200
    assert client.get("/metrics", headers=bearer(tokens["admin"])).status_code == 200


def test_open_metrics_setting(database_url: str, engine: object) -> None:
    from service.app import create_app

    settings = Settings(
        database_url=database_url,
        draw_secret=TEST_SECRET,  # type: ignore[arg-type]
        metrics_access="open",
    )
    with TestClient(create_app(settings)) as client:
        assert client.get("/metrics").status_code == 200


def test_scrape_counts_one_recommendation_exactly(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    audit = tokens["audit"]
    before = scrape(client, audit)
    body = make_request(score=0.9)
    r = client.post(R, json=body, headers=bearer(tokens["scoring"]))
    assert r.status_code == 201, r.text
    action = "true" if r.json()["action"] else "false"
    labels = {"policy": "readmission", "version": "1", "action": action}
    after = scrape(client, audit)
    total = "evenhand_recommendations_total"
    assert value(after, total, **labels) - value(before, total, **labels) == 1
    assert value(after, "evenhand_log_unsealed_records", kind="decision") == 1
    assert value(after, "evenhand_log_oldest_unsealed_age_seconds") >= 0

    # The latency histogram: one more 201 on the route's template.
    count = "evenhand_http_request_duration_seconds_count"
    created = {"method": "POST", "route": R, "status": "201"}
    assert value(after, count, **created) - value(before, count, **created) == 1

    # A replay records nothing: the counter stays, the histogram gets a 200.
    assert client.post(R, json=body, headers=bearer(tokens["scoring"])).status_code == 200
    again = scrape(client, audit)
    assert value(again, total, **labels) == value(after, total, **labels)
    assert value(again, count, method="POST", route=R, status="200") == 1

    # Routes with parameters are labelled by their template, never the raw path.
    client.get("/v1/reports/readmission", headers=bearer(audit))
    client.get("/no/such/path", headers=bearer(audit))
    samples = scrape(client, audit)
    routes = {dict(labels)["route"] for (_n, labels) in samples if "route" in dict(labels)}
    assert "/v1/reports/{policy}" in routes and "unmatched" in routes
    assert not any("readmission" in route or "such" in route for route in routes)

    # Sealing moves the decision from the unsealed tail to the sealed count: same total.
    seal(session_factory)
    sealed = scrape(client, audit)
    assert value(sealed, "evenhand_log_unsealed_records", kind="decision") == 0
    assert value(sealed, total, **labels) == value(after, total, **labels)
    assert value(sealed, "evenhand_db_pool_size") > 0


@pytest.fixture
def captured() -> Iterator[list[logging.LogRecord]]:
    records: list[logging.LogRecord] = []

    class Keep(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            records.append(record)

    handler = Keep(level=logging.DEBUG)
    root = logging.getLogger()
    old = root.level
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    try:
        yield records
    finally:
        root.removeHandler(handler)
        root.setLevel(old)


def test_request_log_is_json_with_the_request_id_and_no_values(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    captured: list[logging.LogRecord],
) -> None:
    publish()
    body = make_request(attributes={"region": "north"}, case_id="case-zz-secretive")
    r = client.post(R, json=body, headers={**bearer(tokens["scoring"]), "X-Request-ID": "abc-123"})
    assert r.status_code == 201
    assert r.headers["x-request-id"] == "abc-123"
    # A header that is not a plain token is replaced by a fresh id.
    other = client.get("/healthz", headers={"X-Request-ID": "bad id\twith spaces"})
    fresh = other.headers["x-request-id"]
    assert len(fresh) == 32 and int(fresh, 16) >= 0
    assert client.get("/healthz").headers["x-request-id"] != fresh

    lines = [JsonFormatter().format(record) for record in captured]
    entries = [json.loads(line) for line in lines]
    access = [e for e in entries if e["logger"] == "evenhand.access"]
    mine = [e for e in access if e.get("request_id") == "abc-123"]
    assert len(mine) == 1
    assert mine[0]["route"] == R and mine[0]["status"] == 201 and mine[0]["method"] == "POST"
    assert mine[0]["duration_ms"] > 0
    assert any(e.get("request_id") == fresh for e in access)
    text = "\n".join(lines)
    for secret in (
        "north",
        "case-zz-secretive",
        tokens["scoring"],
        tokens["audit"],
        tokens["admin"],
        TEST_SECRET,
        "Bearer",
    ):
        assert secret not in text


def test_formatter_drops_extra_fields() -> None:
    record = logging.LogRecord("evenhand.x", logging.INFO, __file__, 1, "hello", None, None)
    record.attributes = {"region": "north"}
    record.token = "sekrit"
    entry = json.loads(JsonFormatter().format(record))
    assert set(entry) == {"time", "level", "logger", "message"}
