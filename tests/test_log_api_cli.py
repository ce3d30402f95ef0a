"""The decision log over HTTP (GET /v1/log/verify), the CLI, and the server's periodic sealer."""

from __future__ import annotations

import asyncio
from collections.abc import Callable

import pytest
from fastapi.testclient import TestClient
from service.audit.seal import seal_pending
from service.audit.sealer import PeriodicSealer
from sqlalchemy import Engine, func, select

from service.cli.main import main
from service.store.models import Recommendation, Seal
from tests.helpers import bearer
from tests.log_helpers import LogDb


def test_verify_endpoint_reports_ok_and_then_the_tampered_record(
    client: TestClient, engine: Engine, make_key: Callable[..., str]
) -> None:
    db = LogDb(engine)
    db.insert_records(6)
    with db.sessions() as session:
        seal = seal_pending(session)
    assert seal is not None
    audit = make_key("audit")
    body = client.get("/v1/log/verify", headers=bearer(audit)).json()
    assert body["ok"] is True and body["problem"] is None
    assert (body["seals_checked"], body["records_checked"]) == (1, 6)
    assert body["head_seal_hash"] == seal.seal_hash

    db.sql("UPDATE recommendations SET attributes = :a WHERE id = 3", a='{"community": "x"}')
    body = client.get("/v1/log/verify", headers=bearer(audit)).json()
    assert body["ok"] is False
    assert body["problem"]["kind"] == "record" and body["problem"]["id"] == 3


@pytest.mark.parametrize("role", ["scoring", "admin"])
def test_verify_endpoint_is_for_the_audit_role_only(
    client: TestClient, make_key: Callable[..., str], role: str
) -> None:
    response = client.get("/v1/log/verify", headers=bearer(make_key(role)))
    assert response.status_code == 403
    assert response.json()["error"]["code"] == "forbidden"
    assert client.get("/v1/log/verify").status_code == 401


def test_verify_endpoint_refuses_a_malformed_expected_hash(
    client: TestClient, make_key: Callable[..., str]
) -> None:
    response = client.get(
        "/v1/log/verify", params={"expected_seal_hash": "nothex"}, headers=bearer(make_key("audit"))
    )
    assert response.status_code == 422


def test_cli_seal_and_verify(
    engine: Engine,
    database_url: str,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", database_url)
    db = LogDb(engine)
    db.insert_records(4)
    assert main(["log", "seal"]) == 0
    out = capsys.readouterr().out
    assert "seal 1: 4 records" in out
    head = out.strip().splitlines()[-1].split()[-1]
    assert main(["log", "seal"]) == 0
    assert "nothing to seal" in capsys.readouterr().out
    assert main(["log", "verify", "--expect", head]) == 0
    assert "ok:" in capsys.readouterr().out

    db.sql("DELETE FROM recommendations WHERE id = 2")
    assert main(["log", "verify"]) == 1
    assert "MISMATCH at seal 1" in capsys.readouterr().out
    assert main(["log", "verify", "--expect", "abc"]) == 2
    assert "64 lowercase hex" in capsys.readouterr().err


def test_periodic_sealer_seals_new_records_and_stops(engine: Engine) -> None:
    db = LogDb(engine)
    db.insert_records(5)

    def sealed_count() -> int:
        with db.sessions() as session:
            return int(
                session.scalar(select(func.count()).where(Recommendation.seal_id.is_not(None))) or 0
            )

    async def scenario() -> int:
        sealer = PeriodicSealer(db.sessions, interval_seconds=0.02)
        sealer.start()
        # Bounded wait for the first tick; the sealer runs in a worker thread.
        for _ in range(500):
            if sealed_count() == 5:
                break
            await asyncio.sleep(0.01)
        db.insert_records(2)
        for _ in range(500):
            if sealed_count() == 7:
                break
            await asyncio.sleep(0.01)
        await sealer.stop()
        return sealed_count()

    assert asyncio.run(scenario()) == 7
    with db.sessions() as session:
        assert session.scalar(select(func.count()).select_from(Seal)) == 2
