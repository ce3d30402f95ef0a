"""A log holding every kind of record, written through the service's own routes, and raw SQL
to tamper with it as someone with write access to the database would."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from fastapi.testclient import TestClient
from sqlalchemy import Engine, text
from sqlalchemy.orm import Session, sessionmaker

from service.store.log_upkeep import Upkeep, keep_log
from service.store.log_verify import VerifyResult, verify_log
from service.store.signing import Signer
from tests.audit_helpers import POLICY, audit_policy, put_live
from tests.helpers import TEST_SIGNING_KEY, bearer, make_request
from tests.insert_only import changes_allowed

SIGNER = Signer.of(Ed25519PrivateKey.from_private_bytes(bytes.fromhex(TEST_SIGNING_KEY)))
"""The key the app signs with in the tests (conftest sets EVENHAND_SIGNING_KEY to it)."""
TRUSTED = {SIGNER.key_id: SIGNER.public_key}


def now_text() -> str:
    return datetime.now(UTC).isoformat()


def seal(factory: sessionmaker[Session], mirror: str | None = None) -> Upkeep:
    """Seal everything, tally it at once, and seal the tallies."""
    return keep_log(factory, SIGNER, "UTC", tally_now=True, mirror=mirror)


def verify(
    factory: sessionmaker[Session],
    heads: list[Mapping[str, Any]] | None = None,
    trusted: Mapping[str, bytes] | None = None,
) -> VerifyResult:
    return verify_log(factory, TRUSTED if trusted is None else trusted, heads=heads or [])


@dataclass
class WrittenLog:
    """What :func:`write_every_kind` made: the recommendations' ids, in order."""

    recommendation_ids: list[str]


def write_every_kind(
    client: TestClient, make_key: Callable[..., str], cases: int = 12
) -> WrittenLog:
    """Through the routes: a policy submitted, approved, activated, a shadow version; scored
    cases; outcomes, one corrected; a final decision; a key revoked; an audit snapshot."""
    put_live(client, make_key, shadow=audit_policy())
    scoring = bearer(make_key("scoring"))
    items = [
        make_request(case_id=f"c-{i}", score=round(0.05 + 0.9 * i / cases, 4)) for i in range(cases)
    ]
    r = client.post("/v1/recommendations/batch", json={"items": items}, headers=scoring)
    assert r.status_code == 201, r.text
    recs = [item["recommendation_id"] for item in r.json()["items"]]
    for i, rid in enumerate(recs[: cases // 2]):
        body = {"recommendation_id": rid, "outcome": i % 2, "observed_at": now_text()}
        r = client.post("/v1/outcomes", json={**body, "source": "records"}, headers=scoring)
        assert r.status_code == 201, r.text
    fixed = {
        "recommendation_id": recs[0],
        "outcome": 1,
        "observed_at": now_text(),
        "source": "records",
        "correction": {"reason": "coding error in the extract"},
    }
    r = client.post("/v1/outcomes", json=fixed, headers=scoring)
    assert r.status_code == 201, r.text
    r = client.post(
        f"/v1/recommendations/{recs[1]}/final",
        json={"decision": "overridden", "reason_code": "declined", "decided_at": now_text()},
        headers=scoring,
    )
    assert r.status_code == 201, r.text
    admin = bearer(make_key("admin"))
    make_key("scoring", "spare-key")
    r = client.post("/v1/keys/spare-key/revoke", json={"reason": "left"}, headers=admin)
    assert r.status_code == 200, r.text
    month = datetime.now(UTC).strftime("%Y-%m")
    r = client.post(
        "/v1/audits",
        json={"policy": POLICY, "month": month, "provisional": True},
        headers=bearer(make_key("audit")),
    )
    assert r.status_code == 201, r.text
    return WrittenLog(recs)


def tamper(engine: Engine, statement: str, **params: Any) -> None:
    """Raw SQL outside the service, as an attacker with the database owner's rights would run
    it: on PostgreSQL with the insert-only triggers switched off for the transaction."""
    if engine.dialect.name == "sqlite":  # the driver's own connection: foreign keys off
        raw = engine.raw_connection()
        try:
            raw.driver_connection.execute("PRAGMA foreign_keys = OFF")  # type: ignore[union-attr]
            raw.driver_connection.execute(statement, params)  # type: ignore[union-attr]
            raw.driver_connection.commit()  # type: ignore[union-attr]
            raw.driver_connection.execute("PRAGMA foreign_keys = ON")  # type: ignore[union-attr]
        finally:
            raw.close()
        return
    with changes_allowed(), engine.begin() as conn:
        conn.execute(text("SET LOCAL session_replication_role = replica"))
        conn.execute(text(statement), params)


def scalar(engine: Engine, statement: str, **params: Any) -> Any:
    with engine.connect() as conn:
        return conn.execute(text(statement), params).scalar()
