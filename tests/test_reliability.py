"""Reliability with real processes: ``evenhand serve`` as a child on a loopback port.

- a kill -9 in the middle of a burst of concurrent requests loses no answered recommendation,
  records none twice, and the log verifies after a restart;
- activating and rolling back while requests are in flight gives no 5xx, and every record names
  a version that was active while its request was in flight (from the lifecycle history).

Every request goes to 127.0.0.1; every loop is bounded in count and time.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import Engine, func, select
from sqlalchemy.orm import Session, sessionmaker

from service.demo.api_client import EvenhandClient
from service.demo.server import ServerProcess
from service.store.models import Recommendation
from tests.helpers import TEST_SECRET, make_policy, make_request
from tests.log_helpers import seal

pytestmark = pytest.mark.slow

WORKERS = 8


@dataclass
class Keys:
    author: str
    reviewer: str
    scoring: str
    audit: str


@pytest.fixture
def keys(make_key: Callable[..., str]) -> Keys:
    return Keys(make_key("admin"), make_key("admin"), make_key("scoring"), make_key("audit"))


@pytest.fixture
def server(database_url: str, engine: Engine, tmp_path: Path) -> Iterator[ServerProcess]:
    env = {
        "EVENHAND_DATABASE_URL": database_url,
        "EVENHAND_DRAW_SECRET": TEST_SECRET,
        # Seal often, so seals run while requests are being written.
        "EVENHAND_SEAL_INTERVAL_SECONDS": "0.2",
    }
    proc = ServerProcess(env, tmp_path / "server.log")
    proc.start()
    try:
        yield proc
    finally:
        proc.stop()


def _bodies(n: int, tag: str) -> list[dict[str, Any]]:
    return [
        make_request(
            request_id=f"{tag}-req-{i}",
            case_id=f"{tag}-case-{i}",
            score=(i % 100) / 100,
            attributes={"region": "north" if i % 3 else "south"},
        )
        for i in range(n)
    ]


@dataclass
class Burst:
    """Outcome of sending requests from several threads at once."""

    answered: dict[str, dict[str, Any]] = field(default_factory=dict)
    window: dict[str, tuple[datetime, datetime]] = field(default_factory=dict)
    refused: list[tuple[int, str]] = field(default_factory=list)
    transport_errors: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)


def _send_all(
    base_url: str,
    token: str,
    bodies: list[dict[str, Any]],
    on_answer: Callable[[int], None] = lambda n: None,
) -> Burst:
    burst = Burst()

    def worker(chunk: list[dict[str, Any]]) -> None:
        headers = {"Authorization": f"Bearer {token}"}
        with httpx.Client(base_url=base_url, timeout=10.0) as client:
            for body in chunk:
                sent = datetime.now(UTC)
                try:
                    response = client.post("/v1/recommendations", json=body, headers=headers)
                except httpx.TransportError:
                    with burst.lock:
                        burst.transport_errors += 1
                    continue
                received = datetime.now(UTC)
                with burst.lock:
                    if response.status_code in (200, 201):
                        burst.answered[body["request_id"]] = response.json()
                        burst.window[body["request_id"]] = (sent, received)
                        count = len(burst.answered)
                    else:
                        burst.refused.append((response.status_code, response.text))
                        count = len(burst.answered)
                on_answer(count)

    threads = [threading.Thread(target=worker, args=(bodies[i::WORKERS],)) for i in range(WORKERS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert not any(t.is_alive() for t in threads), "a client thread did not finish"
    return burst


def _records(factory: sessionmaker[Session], request_ids: list[str]) -> list[Any]:
    with factory() as session:
        return list(
            session.execute(
                select(
                    Recommendation.request_id,
                    Recommendation.recommendation_id,
                    Recommendation.version,
                    Recommendation.issued_at,
                ).where(Recommendation.request_id.in_(request_ids))
            ).all()
        )


def test_kill_9_in_a_burst_loses_no_answered_recommendation(
    server: ServerProcess, keys: Keys, session_factory: sessionmaker[Session]
) -> None:
    with EvenhandClient(server.base_url) as api:
        api.publish(
            keys.author, keys.reviewer, make_policy(), "first version", expected_current=None
        )
    bodies = _bodies(400, "crash")
    kill_at = 120
    killed = threading.Event()

    def maybe_kill(answered: int) -> None:
        if answered >= kill_at and not killed.is_set():
            killed.set()
            server.kill()  # SIGKILL to the server's process group, requests still in flight

    burst = _send_all(server.base_url, keys.scoring, bodies, maybe_kill)
    assert killed.is_set()
    assert burst.refused == []  # nothing but 2xx while the server was up
    assert burst.transport_errors > 0, "the kill did not interrupt the burst"

    ids = [b["request_id"] for b in bodies]
    rows = _records(session_factory, ids)
    by_request = {r.request_id: r for r in rows}
    assert len(by_request) == len(rows)  # no request recorded twice
    assert len({r.recommendation_id for r in rows}) == len(rows)
    for request_id, answer in burst.answered.items():
        # Every answered recommendation is on the record, exactly as answered.
        assert by_request[request_id].recommendation_id == answer["recommendation_id"]

    server.start()  # restart on the same database and port
    seal(session_factory)
    with EvenhandClient(server.base_url) as api:
        assert api.verify(keys.audit)["ok"] is True
    # Sending everything again: recorded requests are replayed (200, same id), the rest new.
    again = _send_all(server.base_url, keys.scoring, bodies)
    assert again.refused == [] and again.transport_errors == 0
    for request_id, answer in burst.answered.items():
        assert again.answered[request_id] == answer
    for request_id, row in by_request.items():
        assert again.answered[request_id]["recommendation_id"] == row.recommendation_id
    with session_factory() as session:
        total = session.scalar(select(func.count()).select_from(Recommendation))
    seal(session_factory)
    assert total == len(bodies)
    with EvenhandClient(server.base_url) as api:
        result = api.verify(keys.audit)
    assert result["ok"] is True and set(result["unsealed"].values()) == {0}, result


def _active_intervals(events: list[dict[str, Any]]) -> list[tuple[datetime, int]]:
    """(from when, which version) for every activation or rollback, in order."""
    out = []
    for e in events:
        if e["action"] in ("activate", "rollback"):
            at = datetime.fromisoformat(e["at"].replace("Z", "+00:00"))
            out.append((at.astimezone(UTC), int(e["to_version"])))
    return sorted(out)


def _versions_active_during(
    intervals: list[tuple[datetime, int]],
    switch_returned: list[datetime],
    start: datetime,
    end: datetime,
) -> set[int]:
    """Versions that may have been active at some moment in [start, end].

    A version is active from its event's time; it stays active until the switch that ended it
    committed, which happened before that admin call returned (``switch_returned``): the event
    is stamped inside the transaction, a little before the commit.
    """
    active: set[int] = set()
    for i, (since, version) in enumerate(intervals):
        until = switch_returned[i] if i < len(switch_returned) else None
        if since <= end and (until is None or until >= start):
            active.add(version)
    return active


def test_activate_and_roll_back_under_load(
    server: ServerProcess, keys: Keys, session_factory: sessionmaker[Session]
) -> None:
    name = "readmission"
    with EvenhandClient(server.base_url) as api:
        v1 = api.publish(
            keys.author, keys.reviewer, make_policy(), "first version", expected_current=None
        )
        v2 = api.submit(keys.author, make_policy(description="lower cut for south"))
        api.approve(keys.reviewer, name, v2)

    bodies = _bodies(500, "switch")
    switches_done = threading.Event()
    switch_errors: list[BaseException] = []
    switch_returned: list[datetime] = []
    progress = threading.Condition()
    answered = [0]

    def on_answer(count: int) -> None:
        with progress:
            answered[0] = count
            progress.notify_all()

    def switcher() -> None:
        # Switch at fixed points of the stream so it happens while requests are in flight.
        try:
            with EvenhandClient(server.base_url) as api:
                for k, at in enumerate([60, 130, 200, 270, 340, 410]):
                    with progress:
                        progress.wait_for(lambda at=at: answered[0] >= at, timeout=60)
                    if k == 0:
                        api.activate(
                            keys.author, name, v2, "trying the lower cut", expected_current=v1
                        )
                    elif k % 2 == 0:  # v2 is retired now: bringing it back is a rollback
                        api.rollback(
                            keys.author,
                            name,
                            "trying the lower cut again",
                            v2,
                            expected_current=v1,
                        )
                    else:
                        api.rollback(
                            keys.author, name, "back to the reviewed cut", expected_current=v2
                        )
                    switch_returned.append(datetime.now(UTC))
        except BaseException as exc:
            switch_errors.append(exc)
        finally:
            switches_done.set()

    thread = threading.Thread(target=switcher)
    thread.start()
    burst = _send_all(server.base_url, keys.scoring, bodies, on_answer)
    thread.join(60)
    assert switches_done.is_set() and not switch_errors, switch_errors
    assert burst.refused == [] and burst.transport_errors == 0  # no 5xx, no refusals at all
    assert len(burst.answered) == len(bodies)

    with EvenhandClient(server.base_url) as api:
        intervals = _active_intervals(api.history(keys.author, name))
    assert [v for _, v in intervals] == [v1, v2, v1, v2, v1, v2, v1]
    rows = {r.request_id: r for r in _records(session_factory, list(burst.answered))}
    seen_versions = set()
    for request_id, answer in burst.answered.items():
        sent, received = burst.window[request_id]
        row = rows[request_id]
        assert row.version == answer["version"]
        # The version that decided was active at some moment while the request was in flight.
        possible = _versions_active_during(intervals, switch_returned, sent, received)
        assert row.version in possible, request_id
        seen_versions.add(row.version)
    assert seen_versions == {v1, v2}
