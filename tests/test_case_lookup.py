"""Decisions by case id (``GET /v1/recommendations?case_id=``, scoring and audit roles), the
scoring role reading one decision back, and the inclusion proof on the console's decision
page, recomputed here independently; on SQLite and PostgreSQL."""

from __future__ import annotations

import hashlib
import html
import re
from collections.abc import Callable

from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from tests.helpers import bearer, make_request
from tests.log_helpers import seal
from tests.test_console import sign_in


def _score(client: TestClient, token: str, case_id: str, n: int) -> list[dict]:
    sent = []
    for _ in range(n):
        body = make_request(case_id=case_id, attributes={"region": "north"})
        r = client.post("/v1/recommendations", json=body, headers=bearer(token))
        assert r.status_code == 201, r.text
        sent.append(r.json())
    return sent


def test_decisions_of_a_case_newest_first_a_page_at_a_time(
    client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]
) -> None:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    mine = _score(client, tokens["scoring"], "case-many", 3)
    _score(client, tokens["scoring"], "case-other", 2)
    for role in ("scoring", "audit"):
        r = client.get(
            "/v1/recommendations", params={"case_id": "case-many"}, headers=bearer(tokens[role])
        )
        assert r.status_code == 200, r.text
        got = r.json()
        ids = [d["recommendation"]["recommendation_id"] for d in got["decisions"]]
        assert ids == [s["recommendation_id"] for s in reversed(mine)]
        assert got["next_before"] is None
        records = [d["record_id"] for d in got["decisions"]]
        assert records == sorted(records, reverse=True)
        # Each item is what GET /v1/recommendations/{id} answers for that decision.
        one = client.get(f"/v1/recommendations/{ids[0]}", headers=bearer(tokens[role])).json()
        assert got["decisions"][0] == one
    audit = bearer(tokens["audit"])
    first = client.get(
        "/v1/recommendations", params={"case_id": "case-many", "limit": 2}, headers=audit
    ).json()
    assert len(first["decisions"]) == 2 and first["next_before"] is not None
    rest = client.get(
        "/v1/recommendations",
        params={"case_id": "case-many", "limit": 2, "before": first["next_before"]},
        headers=audit,
    ).json()
    assert [d["recommendation"]["recommendation_id"] for d in rest["decisions"]] == [
        mine[0]["recommendation_id"]
    ]
    assert rest["next_before"] is None
    # A policy filter, an unknown case (an empty page, not an error), bounds.
    other = client.get(
        "/v1/recommendations",
        params={"case_id": "case-many", "policy": "another-policy"},
        headers=audit,
    ).json()
    assert other == {"decisions": [], "next_before": None}
    same = client.get(
        "/v1/recommendations",
        params={"case_id": "case-many", "policy": "readmission"},
        headers=audit,
    ).json()
    assert len(same["decisions"]) == 3
    for params in ({"case_id": "x", "limit": 51}, {"case_id": ""}, {"limit": 5}):
        r = client.get("/v1/recommendations", params=params, headers=audit)
        assert r.status_code == 422 and "error" in r.json(), params
    admin = client.get(
        "/v1/recommendations", params={"case_id": "x"}, headers=bearer(tokens["admin"])
    )
    assert admin.status_code == 403 and admin.json()["error"]["code"] == "forbidden"


def test_the_scoring_role_reads_a_decision_back(
    client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]
) -> None:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    sent = _score(client, tokens["scoring"], "case-1", 1)[0]
    rid = sent["recommendation_id"]
    by_scoring = client.get(f"/v1/recommendations/{rid}", headers=bearer(tokens["scoring"]))
    by_audit = client.get(f"/v1/recommendations/{rid}", headers=bearer(tokens["audit"]))
    assert by_scoring.status_code == 200 and by_scoring.json() == by_audit.json()
    assert by_scoring.json()["recommendation"] == sent


def test_the_console_lists_a_case_newest_first(
    client: TestClient, tokens: dict[str, str], make_key: Callable[..., str]
) -> None:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    mine = _score(client, tokens["scoring"], "case-c", 3)
    sign_in(client, tokens["audit"])
    page = client.get("/console/decisions", params={"case": "case-c"})
    assert page.status_code == 200
    shown = re.findall(r"/console/decisions\?id=([0-9a-f-]{36})", page.text)
    assert shown == [s["recommendation_id"] for s in reversed(mine)]
    assert "Older decisions" not in page.text
    missing = client.get("/console/decisions", params={"case": "no-such-case"})
    assert missing.status_code == 404 and "no decision has the case id" in missing.text


# RFC 9162 (Laurie, Messeri, Stradling, 2021), section 2.1.1: leaf hash = SHA-256(0x00 ||
# entry), node hash = SHA-256(0x01 || left || right); section 2.1.3.2: verifying an inclusion
# proof. Written here from the RFC's text, without the project's merkle module.
def _rfc9162_root(leaf: bytes, index: int, size: int, path: list[bytes]) -> bytes | None:
    if index >= size:
        return None
    fn, sn, r = index, size - 1, leaf
    for p in path:
        if sn == 0:
            return None
        if fn % 2 == 1 or fn == sn:
            r = hashlib.sha256(b"\x01" + p + r).digest()
            if fn % 2 == 0:
                while fn % 2 == 0 and fn != 0:
                    fn, sn = fn >> 1, sn >> 1
        else:
            r = hashlib.sha256(b"\x01" + r + p).digest()
        fn, sn = fn >> 1, sn >> 1
    return r if sn == 0 else None


def _shown(page: str, name: str) -> list[str]:
    return [html.unescape(v) for v in re.findall(rf'data-proof="{name}">([^<]*)<', page)]


def test_the_decision_page_shows_an_inclusion_proof_that_verifies(
    client: TestClient,
    tokens: dict[str, str],
    make_key: Callable[..., str],
    session_factory: sessionmaker[Session],
) -> None:
    from tests.audit_helpers import put_live

    put_live(client, make_key)
    sent = _score(client, tokens["scoring"], "case-p", 5)
    rid = sent[2]["recommendation_id"]
    sign_in(client, tokens["audit"])
    before = client.get("/console/decisions", params={"id": rid})
    assert "Not sealed yet" in before.text and 'data-proof="root"' not in before.text
    seal(session_factory)
    _score(client, tokens["scoring"], "case-q", 1)  # recorded after the seal: not in its tree
    page = client.get("/console/decisions", params={"id": rid}).text
    assert "Not sealed yet" not in page
    index = int(_shown(page, "leaf_index")[0])
    size = int(_shown(page, "tree_size")[0])
    leaf = bytes.fromhex(_shown(page, "leaf_hash")[0])
    path = [bytes.fromhex(h) for h in _shown(page, "path")]
    root = bytes.fromhex(_shown(page, "root")[0])
    record = _shown(page, "record")[0].encode("utf-8")
    # The shown record is this decision, and the leaf is its hash.
    assert f'"recommendation_id":"{rid}"' in record.decode()
    assert leaf == hashlib.sha256(b"\x00" + record).digest()
    # The path leads from the leaf to the root of the head the API publishes.
    heads = client.get("/v1/log/heads", headers=bearer(tokens["audit"])).json()
    latest = heads[-1]
    assert latest["head"]["root"] == root.hex() and latest["head"]["tree_size"] == size
    assert latest["signature"] in page
    assert len(path) >= 2 and _rfc9162_root(leaf, index, size, path) == root
    # Any other position, or a changed path hash, does not verify.
    assert _rfc9162_root(leaf, index + 1, size, path) != root
    bent = [path[0][:-1] + bytes([path[0][-1] ^ 1]), *path[1:]]
    assert _rfc9162_root(leaf, index, size, bent) != root


def test_the_openapi_document_names_the_roles_and_errors(client: TestClient) -> None:
    paths = client.get("/openapi.json").json()["paths"]
    for path, status in (
        ("/v1/recommendations", {"401", "403", "422"}),
        ("/v1/recommendations/{recommendation_id}", {"401", "403", "404", "422"}),
    ):
        op = paths[path]["get"]
        assert "Roles: scoring, audit." in op["description"]
        assert status <= set(op["responses"])
    limit = next(
        p for p in paths["/v1/recommendations"]["get"]["parameters"] if p["name"] == "limit"
    )
    assert (limit["schema"]["minimum"], limit["schema"]["maximum"]) == (1, 50)
