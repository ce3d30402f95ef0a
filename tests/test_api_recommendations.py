"""Scoring over HTTP: the response, the keyed draw, idempotency, batches, shadow, the record."""

from __future__ import annotations

import hashlib
import hmac
import json
from collections.abc import Callable
from typing import Any

from fastapi.testclient import TestClient
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from service.app import create_app
from service.log.merkle import leaf_hash
from service.log.records import record_bytes
from service.settings import Settings
from service.store.models import Recommendation
from tests.helpers import TEST_SECRET, bearer, count_rows, make_policy, make_request

R = "/v1/recommendations"


def reference_draw(name: str, version: int, case_id: str) -> float:
    # The documented draw (docs/decision-log.md): first 8 bytes of HMAC-SHA256(secret, compact
    # JSON [name, version, case_id]), big-endian, divided by 2^64 -- computed here with the
    # standard library only (RFC 2104 HMAC).
    msg = json.dumps([name, version, case_id], separators=(",", ":"), ensure_ascii=False)
    digest = hmac.new(TEST_SECRET.encode(), msg.encode(), hashlib.sha256).digest()
    return int.from_bytes(digest[:8], "big") / 2**64


def _post(client: TestClient, token: str, body: dict[str, Any]) -> Any:
    return client.post(R, json=body, headers=bearer(token))


def test_recommendation_fields_and_keyed_draw(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    for score, region in [(0.1, "north"), (0.3, "north"), (0.25, "south"), (0.9, "south")]:
        body = make_request(score=score, attributes={"region": region})
        r = _post(client, tokens["scoring"], body)
        assert r.status_code == 201, r.text
        out = r.json()
        assert set(out) == {
            "recommendation_id", "request_id", "case_id", "policy", "version", "group",
            "rule", "probability", "draw", "action", "action_label", "issued_at",
        }  # fmt: skip
        expected_p = {
            ("north", 0.1): 0.0,
            ("north", 0.3): 1.0,
            ("south", 0.25): 0.5,
            ("south", 0.9): 1.0,
        }
        assert out["probability"] == expected_p[(region, score)]
        assert out["draw"] == reference_draw("readmission", 1, body["case_id"])
        assert out["action"] is (out["draw"] < out["probability"])
        assert out["action_label"] == ("offer follow-up" if out["action"] else "standard discharge")
        assert (out["group"], out["rule"], out["version"]) == (region, region, 1)
        assert out["issued_at"].endswith("Z")


def test_same_request_replays_and_writes_nothing(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    body = make_request()
    first = _post(client, tokens["scoring"], body)
    assert first.status_code == 201
    again = _post(client, tokens["scoring"], body)
    assert again.status_code == 200
    assert again.content == first.content  # byte for byte: re-encoded from the stored record
    assert count_rows(session_factory, "recommendations") == 1
    quoted = make_request(case_id='Café "Nord" \\ 7')  # escapes and non-ASCII text
    first_quoted = _post(client, tokens["scoring"], quoted)
    assert first_quoted.json()["case_id"] == 'Café "Nord" \\ 7'
    assert _post(client, tokens["scoring"], quoted).content == first_quoted.content
    assert count_rows(session_factory, "recommendations") == 2
    changed = _post(client, tokens["scoring"], {**body, "score": 0.11})
    assert changed.status_code == 409
    assert changed.json()["error"]["code"] == "idempotency_conflict"
    assert count_rows(session_factory, "recommendations") == 2


def test_record_is_hashed_over_all_fields(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    body = make_request(attributes={"region": "south", "unused": "not stored"})
    out = _post(client, tokens["scoring"], body).json()
    with session_factory() as session:
        rec = session.scalars(select(Recommendation)).one()
    assert rec.attributes == {"region": "south"}  # only what the policy groups by
    # RFC 9162 section 2.1 leaf hash: SHA-256(0x00 || entry), the entry being compact key-sorted
    # JSON of the record's fields and its kind (rebuilt here by hand from the response).
    fields = {
        "kind": "decision",
        **{k: out[k] for k in ("recommendation_id", "request_id", "case_id", "policy", "version",
                               "group", "rule", "probability", "draw", "action", "action_label",
                               "issued_at")},
        "score": body["score"],
        "attributes": {"region": "south"},
        "shadow_version": None,
        "shadow_probability": None,
        "shadow_action": None,
    }  # fmt: skip
    entry = json.dumps(fields, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    assert record_bytes(rec) == entry.encode()
    assert leaf_hash(record_bytes(rec)) == hashlib.sha256(b"\x00" + entry.encode()).digest()


def test_batch_matches_single_requests(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    items = [
        make_request(score=s / 20, attributes={"region": "north" if s % 2 else "south"})
        for s in range(21)
    ]
    r = client.post(f"{R}/batch", json={"items": items}, headers=bearer(tokens["scoring"]))
    assert r.status_code == 201
    assert r.json()["created"] == 21
    batch = r.json()["items"]
    assert [b["request_id"] for b in batch] == [i["request_id"] for i in items]
    for item, out in zip(items, batch, strict=True):
        assert out["draw"] == reference_draw("readmission", 1, item["case_id"])
        # Re-sending one item alone is a replay of the batch's answer.
        single = _post(client, tokens["scoring"], item)
        assert single.status_code == 200 and single.json() == out
    again = client.post(f"{R}/batch", json={"items": items}, headers=bearer(tokens["scoring"]))
    assert again.status_code == 200 and again.json() == {"items": batch, "created": 0}


def test_batch_with_one_bad_item_writes_nothing(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    items = [make_request() for _ in range(5)]
    items[3] = make_request(attributes={"region": "west"})
    items[4] = make_request(attributes={})
    r = client.post(f"{R}/batch", json={"items": items}, headers=bearer(tokens["scoring"]))
    assert r.status_code == 422
    err = r.json()["error"]
    assert err["code"] == "invalid_batch"
    assert [(d["code"], d["field"]) for d in err["details"]] == [
        ("unknown_group", "items.3.attributes"),
        ("missing_attribute", "items.4.attributes.region"),
    ]
    dup = [items[0], items[0]]
    r = client.post(f"{R}/batch", json={"items": dup}, headers=bearer(tokens["scoring"]))
    assert r.status_code == 422 and r.json()["error"]["details"][0]["field"] == "items.1.request_id"
    assert count_rows(session_factory, "recommendations") == 0


def test_batch_limit(
    settings: Settings, tokens: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    assert Settings().max_batch_items == 10_000
    small = settings.model_copy(update={"max_batch_items": 3})
    with TestClient(create_app(small)) as client:
        items = [make_request() for _ in range(4)]
        r = client.post(f"{R}/batch", json={"items": items}, headers=bearer(tokens["scoring"]))
    assert r.status_code == 413 and r.json()["error"]["code"] == "batch_too_large"
    assert count_rows(session_factory, "recommendations") == 0


def test_shadow_is_recorded_not_returned(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    strict = make_policy(
        rules={
            "north": {"steps": [{"from": 0.9, "probability": 1.0}]},
            "south": {"steps": [{"from": 0.9, "probability": 1.0}]},
        }
    )
    v2 = publish(strict, activate=False)
    client.put(
        "/v1/policies/readmission/shadow",
        json={"version": v2, "expected_current": None},
        headers=bearer(tokens["admin"]),
    )
    body = make_request(score=0.5, attributes={"region": "north"})
    out = _post(client, tokens["scoring"], body).json()
    assert "shadow_version" not in out and out["version"] == 1 and out["probability"] == 1.0
    batch = client.post(
        f"{R}/batch", json={"items": [make_request(score=0.95)]}, headers=bearer(tokens["scoring"])
    ).json()["items"]
    with session_factory() as session:
        recs = session.scalars(select(Recommendation).order_by(Recommendation.id)).all()
    assert [(r.shadow_version, r.shadow_probability) for r in recs] == [(2, 0.0), (2, 1.0)]
    assert recs[0].shadow_action is False
    assert recs[1].shadow_action is (reference_draw("readmission", 2, batch[0]["case_id"]) < 1.0)


def test_rollback_switches_the_deciding_version(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    publish(make_policy(action_label="offer a nurse visit"))
    under_v2 = make_request()
    first = _post(client, tokens["scoring"], under_v2).json()
    assert first["version"] == 2
    client.post(
        "/v1/policies/readmission/rollback",
        json={"reason": "label wrong", "expected_current": 2},
        headers=bearer(tokens["admin"]),
    )
    out = _post(client, tokens["scoring"], make_request()).json()
    assert out["version"] == 1
    # A replay is answered from the record, whatever is active now.
    again = _post(client, tokens["scoring"], under_v2)
    assert again.status_code == 200 and again.json() == first


def test_concurrent_repeats_of_one_request_write_one_record(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    from concurrent.futures import ThreadPoolExecutor

    publish()
    body = make_request()
    others = [make_request() for _ in range(12)]

    def post(b: dict[str, Any]) -> tuple[int, Any]:
        r = _post(client, tokens["scoring"], b)
        return r.status_code, r.json()

    with ThreadPoolExecutor(max_workers=8) as pool:
        same = list(pool.map(post, [body] * 8))
        distinct = list(pool.map(post, others))
    statuses = sorted(s for s, _ in same)
    assert statuses == [200] * 7 + [201]
    assert len({json.dumps(out, sort_keys=True) for _, out in same}) == 1
    assert [s for s, _ in distinct] == [201] * 12
    assert count_rows(session_factory, "recommendations") == 13


def test_batch_reusing_a_stored_request_id_with_another_body(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    stored = make_request()
    assert _post(client, tokens["scoring"], stored).status_code == 201
    items = [make_request(), {**stored, "score": 0.99}]
    r = client.post(f"{R}/batch", json={"items": items}, headers=bearer(tokens["scoring"]))
    assert r.status_code == 422
    assert [(d["code"], d["field"]) for d in r.json()["error"]["details"]] == [
        ("idempotency_conflict", "items.1.request_id")
    ]
    assert count_rows(session_factory, "recommendations") == 1
