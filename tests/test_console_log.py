"""The console's log page (audit role), on SQLite and PostgreSQL: the latest signed head as
the API publishes it, and a verification run on demand that reports what the API reports."""

from __future__ import annotations

from collections.abc import Callable

from fastapi.testclient import TestClient
from sqlalchemy import Engine
from sqlalchemy.orm import Session, sessionmaker

from tests.helpers import bearer, make_request
from tests.log_helpers import seal, tamper
from tests.test_console import csrf_of, sign_in


def _decide(client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]) -> None:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    for _ in range(3):
        body = make_request(attributes={"region": "north"})
        r = client.post("/v1/recommendations", json=body, headers=bearer(tokens["scoring"]))
        assert r.status_code == 201, r.text


def test_head_and_verification_match_the_api(
    client: TestClient,
    tokens: dict[str, str],
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
    engine: Engine,
) -> None:
    _decide(client, tokens, make_key)
    csrf = sign_in(client, tokens["audit"])
    assert "Nothing has been sealed yet" in client.get("/console/log").text
    seal(session_factory)
    audit = bearer(tokens["audit"])
    head = client.get("/v1/log/heads", headers=audit).json()[-1]
    page = client.get("/console/log")
    assert page.status_code == 200
    for value in (head["head"]["root"], head["head"]["key_id"], head["signature"]):
        assert value in page.text
    assert f"{head['head']['tree_size']:,}" in page.text
    # Without the form's token: refused, nothing run.
    refused = client.post("/console/log/verify", data={})
    assert refused.status_code == 403 and "Verification" not in refused.text
    api = client.get("/v1/log/verify", headers=audit).json()
    ran = client.post("/console/log/verify", data={"csrf": csrf})
    assert ran.status_code == 200
    assert api["ok"] is True and "<strong>Verified</strong>" in ran.text
    assert f'Records checked</th><td class="num">{api["records_checked"]}<' in ran.text
    # A decision edited behind the service's back: both report the same problem.
    tamper(engine, "UPDATE recommendations SET action_label = 'edited' WHERE id = 1")
    api = client.get("/v1/log/verify", headers=audit).json()
    assert api["ok"] is False
    ran = client.post("/console/log/verify", data={"csrf": csrf_of(ran.text)})
    assert "Problem found" in ran.text
    assert f"{api['problem']['kind']} {api['problem']['id']}" in ran.text


def test_the_log_page_is_for_the_audit_role(client: TestClient, tokens: dict[str, str]) -> None:
    csrf = sign_in(client, tokens["admin"])
    assert client.get("/console/log").status_code == 403
    assert client.post("/console/log/verify", data={"csrf": csrf}).status_code == 403
