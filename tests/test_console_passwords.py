"""Per-person console passwords (SQLite and PostgreSQL): scrypt against RFC 7914's vector
and an independent computation, an admin binds a name to a key by its token, sign-in with
name and password acts as that key (four-eyes between keys), refusals say nothing specific."""

from __future__ import annotations

import hashlib
import hmac

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.orm import Session, sessionmaker

from service.console import passwords
from service.store.console_passwords import ConsolePasswordRow
from tests.helpers import bearer, make_policy
from tests.test_console import csrf_of, sign_in

PASSWORD = "correct horse battery"


def test_scrypt_matches_rfc_7914_vector() -> None:
    # Percival & Josefsson, "The scrypt Password-Based Key Derivation Function", RFC 7914
    # (2016), section 12, second vector: P="password", S="NaCl", N=1024, r=8, p=16, dkLen=64.
    expected = bytes.fromhex(
        "fdbabe1c9d3472007856e7190d01e9fe7c6ad7cbc8237830e77376634b373162"
        "2eaf30d92e22a3886ff109279d9830dac727afb94a83ee6d8360cbdfa2cc0640"
    )
    assert hashlib.scrypt(b"password", salt=b"NaCl", n=1024, r=8, p=16, dklen=64) == expected
    assert passwords.derive("password", b"NaCl", n=1024, r=8, p=16) == expected


def test_hash_and_verify() -> None:
    stored = passwords.hash_password(PASSWORD)
    assert (stored.n, stored.r, stored.p) == (2**14, 8, 1) and len(stored.salt) == 16
    assert passwords.verify(PASSWORD, stored)
    assert not passwords.verify(PASSWORD + "x", stored)
    assert passwords.hash_password(PASSWORD).salt != stored.salt  # a random salt each time
    assert not passwords.verify_or_spend(PASSWORD, None)
    assert passwords.weakness("short") is not None and passwords.weakness(PASSWORD) is None


def _set(client: TestClient, csrf: str, person: str, token: str, password: str = PASSWORD) -> str:
    r = client.post(
        "/console/people",
        data={
            "csrf": csrf,
            "person": person,
            "api_key": token,
            "password": password,
            "password_again": password,
        },
    )
    return r.text if r.status_code == 200 else f"{r.status_code} {r.text}"


def _password_sign_in(client: TestClient, person: str, password: str) -> int:
    page = client.get("/console/sign-in")
    r = client.post(
        "/console/sign-in/password",
        data={"csrf": csrf_of(page.text), "person": person, "password": password},
        follow_redirects=False,
    )
    return r.status_code


def test_admin_sets_a_password_and_the_person_acts_as_the_key(
    client: TestClient, tokens: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    csrf = sign_in(client, tokens["admin"])
    assert "can now sign in" in _set(client, csrf, "bo", tokens["admin2"])
    assert "can now sign in" in _set(client, csrf, "ada", tokens["admin"])
    # The stored hash is scrypt with the documented parameters, checked independently.
    with session_factory() as session:
        row = session.get(ConsolePasswordRow, "bo")
        assert row is not None and (row.n, row.r, row.p) == (2**14, 8, 1)
        again = hashlib.scrypt(
            PASSWORD.encode(), salt=row.salt, n=2**14, r=8, p=1, maxmem=64 * 2**20, dklen=64
        )
        assert hmac.compare_digest(again, row.hash)
        assert PASSWORD.encode() not in row.hash
    # Ada submits a draft as herself (her key); Bo, by password, approves it as his key.
    r = client.post(
        "/v1/policies/readmission/versions", json=make_policy(), headers=bearer(tokens["admin"])
    )
    assert r.status_code == 201
    assert _password_sign_in(client, "ada", PASSWORD) == 303
    page = client.get("/console/policies/readmission/confirm/approve?version=1")
    r = client.post(
        "/console/policies/readmission/confirm/approve",
        data={"csrf": csrf_of(page.text), "version": "1"},
    )
    assert r.status_code == 403 and "four_eyes" in r.text  # her password is her key
    assert _password_sign_in(client, "bo", PASSWORD) == 303
    page = client.get("/console/policies/readmission/confirm/approve?version=1")
    assert "admin-approver" in page.text
    r = client.post(
        "/console/policies/readmission/confirm/approve",
        data={"csrf": csrf_of(page.text), "version": "1"},
        follow_redirects=False,
    )
    assert r.status_code == 303
    history = client.get("/v1/policies/readmission/history", headers=bearer(tokens["admin"]))
    assert history.json()[-1]["actor"] == "admin-approver"


@pytest.mark.parametrize(
    ("person", "password"), [("bo", "wrong password!"), ("nobody", PASSWORD), ("", PASSWORD)]
)
def test_wrong_name_or_password_is_refused(
    client: TestClient, tokens: dict[str, str], person: str, password: str
) -> None:
    csrf = sign_in(client, tokens["admin"])
    _set(client, csrf, "bo", tokens["admin2"])
    fresh = TestClient(client.app)
    assert _password_sign_in(fresh, person, password) == 401
    assert fresh.get("/console/policies", follow_redirects=False).status_code == 303


def test_setting_a_password_needs_the_keys_token_and_a_long_password(
    client: TestClient, tokens: dict[str, str]
) -> None:
    csrf = sign_in(client, tokens["admin"])
    assert _set(client, csrf, "bo", "eh_" + "A" * 43).startswith("422")
    assert _set(client, csrf, "bo", tokens["scoring"]).startswith("422")
    assert _set(client, csrf, "bo", tokens["admin2"], "short").startswith("422")
    assert _set(client, csrf, "Bo Smith", tokens["admin2"]).startswith("422")
    r = client.post("/console/people", data={"person": "bo", "api_key": tokens["admin2"]})
    assert r.status_code == 403 and "csrf_failed" in r.text
    # Auditors cannot set passwords; an audit key's person signs in as an auditor.
    assert "can now sign in" in _set(client, csrf, "cy", tokens["audit"])
    assert _password_sign_in(client, "cy", PASSWORD) == 303
    assert client.get("/console/people").status_code == 403
    assert client.get("/console/reports").status_code == 200


def test_a_revoked_key_ends_password_sign_in(
    client: TestClient, tokens: dict[str, str], session_factory: sessionmaker[Session]
) -> None:
    from service.store import keys

    csrf = sign_in(client, tokens["admin"])
    _set(client, csrf, "cy", tokens["audit"])
    with session_factory() as session:
        keys.revoke_key(session, "auditor", "left", "admin-author", keep_an_admin=True)
        session.commit()
    assert _password_sign_in(TestClient(client.app), "cy", PASSWORD) == 401
