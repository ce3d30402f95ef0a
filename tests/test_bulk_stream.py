"""Streaming bulk scoring over HTTP (POST /v1/recommendations/stream), on both databases.

Chunks are made small here (``max_batch_items=4``) so every stream spans several of them, and
the body size limit tiny (1,024 bytes), which the stream must not be held to.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, text
from sqlalchemy.orm import Session, sessionmaker

from service.app import create_app
from service.settings import Settings
from tests.helpers import TEST_SECRET, bearer, count_rows, make_request

S = "/v1/recommendations/stream"
CHUNK = 4


@pytest.fixture
def settings(database_url: str) -> Settings:
    return Settings(
        database_url=database_url,  # type: ignore[arg-type]
        draw_secret=TEST_SECRET,  # type: ignore[arg-type]
        max_batch_items=CHUNK,
        max_body_bytes=1024,
    )


def _ndjson(bodies: list[dict[str, Any]]) -> bytes:
    return "".join(json.dumps(b) + "\n" for b in bodies).encode()


def _stream(client: TestClient, token: str, body: bytes) -> Any:
    headers = {**bearer(token), "Content-Type": "application/x-ndjson"}
    return client.post(S, content=body, headers=headers)


def _requests(n: int) -> list[dict[str, Any]]:
    regions = ["north", "south"]
    return [
        make_request(score=(i % 10) / 10, attributes={"region": regions[i % 2]}) for i in range(n)
    ]


def test_stream_answers_are_the_single_and_batch_routes_answers(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    scoring = tokens["scoring"]
    bodies = _requests(11)
    # Two of them recorded by the batch route first, so the stream replays them.
    first = client.post(
        "/v1/recommendations/batch", json={"items": bodies[3:5]}, headers=bearer(scoring)
    )
    assert first.status_code == 201, first.text
    r = _stream(client, scoring, _ndjson(bodies))
    assert r.status_code == 200, r.text
    assert r.headers["content-type"] == "application/x-ndjson"
    lines = r.content.split(b"\n")
    assert lines[-1] == b"" and len(lines) == 12  # one answer per line, each ending in \n
    lines = lines[:-1]
    assert [json.loads(x)["request_id"] for x in lines] == [b["request_id"] for b in bodies]
    # The batch route's own bytes for the two it recorded.
    batch_items = json.loads(first.content)["items"]
    assert [json.loads(x) for x in lines[3:5]] == batch_items
    assert b",".join(lines[3:5]) in first.content
    # Every answer is byte for byte what the single route replays for the same request ...
    for body, line in zip(bodies, lines, strict=True):
        single = client.post("/v1/recommendations", json=body, headers=bearer(scoring))
        assert single.status_code == 200, single.text
        assert single.content == line
    # ... and what the batch route replays.
    again = client.post(
        "/v1/recommendations/batch", json={"items": bodies[:CHUNK]}, headers=bearer(scoring)
    )
    assert again.status_code == 200
    assert again.content == b'{"items":[' + b",".join(lines[:CHUNK]) + b'],"created":0}'


def test_a_repeated_stream_replays_its_answers_and_writes_nothing(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    body = _ndjson(_requests(10))
    assert len(body) > 1024  # over the body limit of the other routes
    first = _stream(client, tokens["scoring"], body)
    assert first.status_code == 200, first.text
    assert count_rows(session_factory, "recommendations") == 10
    second = _stream(client, tokens["scoring"], body)
    assert second.content == first.content
    assert count_rows(session_factory, "recommendations") == 10


def test_a_bad_line_ends_the_stream_after_the_lines_before_it(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    bodies = _requests(9)
    bodies[6] = {**bodies[6], "score": "high"}  # line 7, in the second chunk
    r = _stream(client, tokens["scoring"], _ndjson(bodies))
    assert r.status_code == 200
    lines = r.content.decode().splitlines()
    assert len(lines) == 7
    assert [json.loads(x)["request_id"] for x in lines[:6]] == [b["request_id"] for b in bodies[:6]]
    error = json.loads(lines[6])["error"]
    assert error["code"] == "validation_error"
    assert error["field"] == "line.7.score"
    assert error["message"].startswith("line 7: score: ")
    assert error["details"][0]["field"] == "line.7.score"
    # Answered means recorded, nothing else: lines 1-6 only.
    assert count_rows(session_factory, "recommendations") == 6

    # A line the store refuses (score outside the policy's range), in the middle of a chunk.
    fixed = [*bodies[:6], {**bodies[6], "score": 7.0}, *bodies[7:]]
    r = _stream(client, tokens["scoring"], _ndjson(fixed))
    again = r.content.decode().splitlines()
    assert again[:6] == lines[:6]  # replayed
    assert json.loads(again[6])["error"]["code"] == "score_out_of_range"
    assert json.loads(again[6])["error"]["field"] == "line.7.score"
    assert count_rows(session_factory, "recommendations") == 6

    # Fixed: the first six replay, the rest are new.
    fixed[6]["score"] = 0.5
    r = _stream(client, tokens["scoring"], _ndjson(fixed))
    final = r.content.decode().splitlines()
    assert final[:6] == lines[:6] and len(final) == 9
    assert count_rows(session_factory, "recommendations") == 9


def test_refusals_before_any_answer_take_their_own_status(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    scoring = tokens["scoring"]
    r = _stream(client, scoring, b"\n" + _ndjson([make_request(policy="nope")]))
    assert r.status_code == 422
    assert r.json()["error"]["code"] == "unknown_policy"
    assert r.json()["error"]["field"] == "line.2.policy"  # blank lines are counted
    r = _stream(client, scoring, b'{"request_id": \n')
    assert r.status_code == 422 and r.json()["error"]["code"] == "malformed_json"
    assert r.json()["error"]["field"] == "line.1"
    r = _stream(client, scoring, b"\n\n")
    assert r.status_code == 422 and r.json()["error"]["code"] == "empty_stream"
    r = client.post(S, content=_ndjson(_requests(1)), headers=bearer(scoring))
    assert r.status_code == 415 and r.json()["error"]["code"] == "unsupported_media_type"
    long_line = json.dumps(make_request(case_id="x" * 70_000)).encode()
    r = _stream(client, scoring, _ndjson(_requests(2)) + long_line + b"\n")
    assert r.status_code == 200
    error = json.loads(r.content.splitlines()[-1])["error"]
    assert (error["code"], error["field"]) == ("line_too_long", "line.3")
    r = _stream(client, tokens["audit"], _ndjson(_requests(1)))
    assert r.status_code == 403


def _drive(client: TestClient, token: str, pieces: list[bytes]) -> tuple[list[str], list[bytes]]:
    """Call the app at the ASGI level with the body in ``pieces``: ("read"/"sent" events in
    order, the answer's body messages)."""
    events: list[str] = []
    sent: list[bytes] = []
    pieces = list(pieces)

    async def receive() -> dict[str, Any]:
        piece = pieces.pop(0)
        events.append("read")
        return {"type": "http.request", "body": piece, "more_body": bool(pieces)}

    async def send(message: dict[str, Any]) -> None:
        if message.get("body"):
            events.append("sent")
            sent.append(message["body"])

    scope = {
        "type": "http",
        "asgi": {"version": "3.0", "spec_version": "2.3"},
        "http_version": "1.1",
        "method": "POST",
        "scheme": "http",
        "path": S,
        "raw_path": S.encode(),
        "root_path": "",
        "query_string": b"",
        "headers": [
            (b"authorization", f"Bearer {token}".encode()),
            (b"content-type", b"application/x-ndjson"),
            (b"transfer-encoding", b"chunked"),
        ],
        "client": ("127.0.0.1", 1),
        "server": ("testserver", 80),
        "state": {},
    }
    assert client.portal is not None
    client.portal.call(client.app, scope, receive, send)
    return events, sent


def test_the_body_is_read_as_the_answers_go_out(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    """Driven at the ASGI level, one line per body message: the answers go out while the
    body is still being read, and no more than two chunks of the input are read ahead of
    the answers (the one being written and the next one)."""
    publish()
    bodies = _requests(3 * CHUNK + 2)
    events, sent = _drive(
        client, tokens["scoring"], [json.dumps(b).encode() + b"\n" for b in bodies]
    )
    # One answer message per chunk: 4 + 4 + 4 + 2 lines.
    assert [len(b.splitlines()) for b in sent] == [CHUNK, CHUNK, CHUNK, 2]
    # How many lines were read before each answer went out: two chunks before the first
    # (a buffering route would read all 14 first), one more chunk before each next one.
    reads_before = [events[:i].count("read") for i, e in enumerate(events) if e == "sent"]
    assert reads_before == [2 * CHUNK, 3 * CHUNK, 3 * CHUNK + 2, 3 * CHUNK + 2]
    answered = [json.loads(x)["request_id"] for b in sent for x in b.splitlines()]
    assert answered == [b["request_id"] for b in bodies]


def test_lines_split_across_body_messages(
    client: TestClient, tokens: dict[str, str], publish: Callable[..., int]
) -> None:
    publish()
    bodies = _requests(6)
    body = _ndjson(bodies).rstrip(b"\n")  # the last line without its line feed
    _, sent = _drive(client, tokens["scoring"], [body[i : i + 7] for i in range(0, len(body), 7)])
    answered = [json.loads(x)["request_id"] for b in sent for x in b.splitlines()]
    assert answered == [b["request_id"] for b in bodies]
    # A line over the limit, arriving in small pieces, is refused without being held whole.
    long_line = b"x" * 70_000
    pieces = [_ndjson(_requests(1))] + [long_line[i : i + 1000] for i in range(0, 70_000, 1000)]
    events, sent = _drive(client, tokens["scoring"], pieces)
    error = json.loads(sent[-1].splitlines()[-1])["error"]
    assert (error["code"], error["field"]) == ("line_too_long", "line.2")
    assert events.count("read") < len(pieces)  # stopped reading at the limit


def test_a_repeated_request_id_is_answered_as_a_replay_within_and_across_chunks(
    client: TestClient,
    tokens: dict[str, str],
    publish: Callable[..., int],
    session_factory: sessionmaker[Session],
) -> None:
    publish()
    bodies = _requests(6)
    # Line 3 repeats line 1 (same chunk), line 7 repeats line 2 (next chunk).
    stream = [bodies[0], bodies[1], bodies[0], *bodies[2:], bodies[1]]
    r = _stream(client, tokens["scoring"], _ndjson(stream))
    lines = r.content.splitlines()
    assert len(lines) == 8
    assert lines[2] == lines[0] and lines[7] == lines[1]
    assert count_rows(session_factory, "recommendations") == 6
    # The same request_id with another body: the single route's conflict, on its line.
    r = _stream(client, tokens["scoring"], _ndjson([bodies[2], {**bodies[0], "score": 0.9}]))
    lines = r.content.splitlines()
    assert len(lines) == 2
    error = json.loads(lines[1])["error"]
    assert (error["code"], error["field"]) == ("idempotency_conflict", "line.2.request_id")


def test_every_answer_is_committed_before_it_is_sent(
    settings: Settings,
    engine: Engine,
    tokens: dict[str, str],
    client: TestClient,
    publish: Callable[..., int],
) -> None:
    """Watching the ASGI send channel: whenever answers go out, another connection already
    sees at least as many records as lines were answered."""
    publish()
    app = create_app(settings)
    seen: list[tuple[int, int]] = []
    answered = 0

    async def watching(scope: Any, receive: Any, send: Any) -> None:
        async def watched_send(message: Any) -> None:
            nonlocal answered
            if message["type"] == "http.response.body" and message.get("body"):
                answered += message["body"].count(b"\n")
                with engine.connect() as conn:
                    n = conn.execute(text("SELECT COUNT(*) FROM recommendations")).scalar_one()
                seen.append((answered, int(n)))
            await send(message)

        await app(scope, receive, watched_send)

    with TestClient(watching) as watched:  # type: ignore[arg-type]
        r = _stream(watched, tokens["scoring"], _ndjson(_requests(3 * CHUNK + 1)))
    assert r.status_code == 200
    assert len(seen) == 4 and seen[-1][0] == 3 * CHUNK + 1
    assert all(stored >= sent for sent, stored in seen), seen
