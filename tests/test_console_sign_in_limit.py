"""The limit on password attempts and a person changing their own password (SQLite and
PostgreSQL): 429 with Retry-After after exactly N failures, per name and per client address,
shared by two app instances (as by two worker processes), a success taking back only its own
count, the window's end; the old password required, CSRF, the length rules."""

from __future__ import annotations

import hashlib
import hmac
from collections.abc import Iterator
from datetime import timedelta

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, select, update
from sqlalchemy.orm import Session, sessionmaker

from service.app import create_app
from service.settings import Settings
from service.store.console_passwords import ConsolePasswordRow
from service.store.models import utcnow
from service.store.sign_in_limits import SignInFailureRow
from tests.test_console import csrf_of, sign_in
from tests.test_console_passwords import PASSWORD, _set

LIMIT = 3
WINDOW_MINUTES = 15.0


@pytest.fixture
def limited(settings: Settings, engine: Engine) -> Iterator[dict[str, TestClient]]:
    """Three clients at three addresses; x2 is another app instance (another worker)."""
    limited_settings = settings.model_copy(
        update={
            "console_sign_in_limit": LIMIT,
            "console_sign_in_window_minutes": WINDOW_MINUTES,
        }
    )
    with (
        TestClient(create_app(limited_settings), client=("192.0.2.1", 1000)) as x,
        TestClient(create_app(limited_settings), client=("192.0.2.1", 1001)) as x2,
        TestClient(create_app(limited_settings), client=("198.51.100.2", 1000)) as y,
        TestClient(create_app(limited_settings), client=("203.0.113.3", 1000)) as z,
    ):
        yield {"x": x, "x2": x2, "y": y, "z": z}


def _attempt(client: TestClient, person: str, password: str) -> tuple[int, str, str | None]:
    page = client.get("/console/sign-in")
    r = client.post(
        "/console/sign-in/password",
        data={"csrf": csrf_of(page.text), "person": person, "password": password},
        follow_redirects=False,
    )
    return r.status_code, r.text, r.headers.get("retry-after")


def _bind(client: TestClient, tokens: dict[str, str]) -> None:
    csrf = sign_in(client, tokens["admin"])
    assert "can now sign in" in _set(client, csrf, "bo", tokens["admin2"])
    assert "can now sign in" in _set(client, csrf, "ada", tokens["admin"])


def test_429_after_exactly_the_limit_per_name_and_per_address(
    limited: dict[str, TestClient],
    tokens: dict[str, str],
    session_factory: sessionmaker[Session],
) -> None:
    x, x2, y, z = limited["x"], limited["x2"], limited["y"], limited["z"]
    _bind(z, tokens)
    # LIMIT failures for bo from address x, counted across two app instances: each a 401.
    for client in (x, x2, x)[:LIMIT]:
        status, _, retry = _attempt(client, "bo", "wrong password!!")
        assert status == 401 and retry is None
    # The next attempt is refused before its password is checked, even the right one.
    status, text, retry = _attempt(x2, "bo", PASSWORD)
    assert status == 429 and "too_many_attempts" in text
    assert retry is not None and 60 * WINDOW_MINUTES - 30 <= int(retry) <= 60 * WINDOW_MINUTES
    # Per name: bo is refused from another address too.
    assert _attempt(y, "bo", PASSWORD)[0] == 429
    # Per address: anyone else from x is refused; ada from y signs in.
    assert _attempt(x, "ada", PASSWORD)[0] == 429
    assert _attempt(y, "ada", PASSWORD)[0] == 303
    # That success reset no one else's count.
    assert _attempt(y, "bo", PASSWORD)[0] == 429
    assert _attempt(x, "ada", PASSWORD)[0] == 429
    # After the window, bo and address x may try again.
    with session_factory() as session:
        old = utcnow() - timedelta(minutes=WINDOW_MINUTES, seconds=1)
        session.execute(update(SignInFailureRow).values(window_start=old))
        session.commit()
    assert _attempt(x, "bo", PASSWORD)[0] == 303
    with session_factory() as session:  # past windows were purged; this success counts 0
        rows = session.scalars(select(SignInFailureRow)).all()
        assert sorted((r.scope, r.subject, r.failures) for r in rows) == [
            ("address", "192.0.2.1", 0),
            ("name", "bo", 0),
        ]


def test_a_success_takes_back_only_its_own_count(
    limited: dict[str, TestClient], tokens: dict[str, str]
) -> None:
    z = limited["z"]
    _bind(z, tokens)
    y = limited["y"]
    for _ in range(LIMIT - 1):
        assert _attempt(y, "ada", "wrong password!!")[0] == 401
    assert _attempt(y, "ada", PASSWORD)[0] == 303  # counts failures: still LIMIT - 1
    assert _attempt(y, "ada", "wrong password!!")[0] == 401  # the LIMIT-th failure
    assert _attempt(y, "ada", PASSWORD)[0] == 429


def _change(client: TestClient, csrf: str | None, old: str, new: str, again: str | None = None):
    data = {"old_password": old, "password": new, "password_again": new if again is None else again}
    if csrf is not None:
        data["csrf"] = csrf
    return client.post("/console/password", data=data)


def test_a_person_changes_their_own_password(
    limited: dict[str, TestClient],
    tokens: dict[str, str],
    session_factory: sessionmaker[Session],
) -> None:
    z, y = limited["z"], limited["y"]
    _bind(z, tokens)
    assert _attempt(y, "bo", PASSWORD)[0] == 303
    page = y.get("/console/password")
    assert page.status_code == 200 and "Change the password of bo" in page.text
    csrf = csrf_of(page.text)
    new = "a much longer new passphrase"
    assert _change(y, None, PASSWORD, new).status_code == 403  # no CSRF token
    assert _change(y, "wrong", PASSWORD, new).status_code == 403
    assert _change(y, csrf, PASSWORD, "too short").status_code == 422
    assert _change(y, csrf, PASSWORD, new, new + "x").status_code == 422
    wrong = _change(y, csrf, "not the password", new)
    assert wrong.status_code == 401 and "old password is wrong" in wrong.text
    done = _change(y, csrf, PASSWORD, new)
    assert done.status_code == 200 and "is changed" in done.text
    with session_factory() as session:
        row = session.get(ConsolePasswordRow, "bo")
        assert row is not None and row.set_by == "admin-approver"
        again = hashlib.scrypt(
            new.encode(), salt=row.salt, n=row.n, r=row.r, p=row.p, maxmem=64 * 2**20, dklen=64
        )
        assert hmac.compare_digest(again, row.hash)
    assert _attempt(limited["x"], "bo", PASSWORD)[0] == 401
    assert _attempt(limited["x"], "bo", new)[0] == 303
    # Wrong old passwords count against the limit like sign-ins (bo: 1 + 1 failures so far).
    csrf = csrf_of(limited["x"].get("/console/password").text)
    assert _change(limited["x"], csrf, "nope nope nope", "another long one!").status_code == 401
    assert _change(limited["x"], csrf, new, "another long one!").status_code == 429


def test_a_password_change_ends_the_keys_other_sessions(
    limited: dict[str, TestClient], tokens: dict[str, str]
) -> None:
    z, y, x2 = limited["z"], limited["y"], limited["x2"]
    _bind(z, tokens)
    assert _attempt(y, "bo", PASSWORD)[0] == 303
    assert _attempt(x2, "bo", PASSWORD)[0] == 303  # bo also signed in elsewhere
    assert x2.get("/console/password", follow_redirects=False).status_code == 200
    csrf = csrf_of(y.get("/console/password").text)
    done = _change(y, csrf, PASSWORD, "a much longer new passphrase")
    assert done.status_code == 200 and "1 other session(s)" in done.text
    # The other session is gone (back to sign-in); the one that changed it goes on, and
    # the admin's own session (another key) is untouched.
    gone = x2.get("/console/password", follow_redirects=False)
    assert gone.status_code == 303 and "/console/sign-in" in gone.headers["location"]
    assert y.get("/console/password", follow_redirects=False).status_code == 200
    assert z.get("/console/people", follow_redirects=False).status_code == 200


def test_no_password_for_a_key_signed_in_session(
    limited: dict[str, TestClient], tokens: dict[str, str]
) -> None:
    z = limited["z"]
    csrf = sign_in(z, tokens["audit"])
    page = z.get("/console/password")
    assert page.status_code == 200 and "No name signs in with a password" in page.text
    r = _change(z, csrf, PASSWORD, "a much longer new passphrase")
    assert r.status_code == 404 and "No password is set" in r.text
