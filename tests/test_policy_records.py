"""The canonical encodings of policy versions, lifecycle events and key events (log leaves).

The expected bytes are written out literally: compact JSON with the keys in code-point order,
UTF-8 (common practice for canonical JSON; the same rule as the decision records). Every
field that matters changes the bytes; the row's own id does not; what is read back from
either database encodes exactly as what was written.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, replace
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from service.log.policy_records import (
    key_event_bytes,
    key_event_payload,
    policy_event_bytes,
    policy_event_payload,
    policy_version_bytes,
    policy_version_payload,
)
from service.store.models import ApiKey, KeyEvent, PolicyEvent, PolicyVersion

AT = datetime(2026, 12, 4, 10, 15, 2, 114000, tzinfo=UTC)


@dataclass(frozen=True)
class Version:
    id: int
    name: str
    version: int
    document: dict[str, Any]
    content_hash: str
    author_key_id: int | None
    author: str
    created_at: datetime


@dataclass(frozen=True)
class Event:
    id: int
    name: str
    action: str
    actor_key_id: int | None
    actor: str
    at: datetime
    from_version: int | None
    to_version: int | None
    reason: str | None
    expected_sent: bool
    expected_current: int | None


@dataclass(frozen=True)
class Key:
    id: int
    name: str
    role: str
    token_hash: str
    created_at: datetime


@dataclass(frozen=True)
class KeyChange:
    id: int
    key_id: int
    action: str
    at: datetime
    by_key_id: int | None
    by: str
    reason: str | None


VERSION = Version(7, "readmission", 3, {"b": 1, "a": "é"}, "ab" * 32, 2, "alice", AT)
EVENT = Event(40, "readmission", "rollback", 5, "bob", AT, 3, 2, "too many", True, 3)
KEY = Key(5, "bob", "admin", "cd" * 32, AT - timedelta(days=1))
REVOKE = KeyChange(9, 5, "revoke", AT, 2, "alice", "left")


def test_the_bytes_written_out() -> None:
    assert policy_version_bytes(VERSION) == (
        '{"author":"alice","author_key_id":2,"content_hash":"' + "ab" * 32 + '",'
        '"created_at":"2026-12-04T10:15:02.114000Z","document":{"a":"é","b":1},'
        '"kind":"policy_version","policy":"readmission","version":3}'
    ).encode("utf-8")
    assert policy_event_bytes(EVENT) == (
        b'{"action":"rollback","actor":"bob","actor_key_id":5,'
        b'"at":"2026-12-04T10:15:02.114000Z","expected_current":3,"expected_sent":true,'
        b'"from_version":3,"kind":"policy_event","policy":"readmission","reason":"too many",'
        b'"to_version":2}'
    )
    assert key_event_bytes(REVOKE, KEY) == (
        b'{"action":"revoke","at":"2026-12-04T10:15:02.114000Z","by":"alice","by_key_id":2,'
        b'"key_created_at":"2026-12-03T10:15:02.114000Z","key_id":5,"key_name":"bob",'
        b'"key_role":"admin","key_token_hash":"' + b"cd" * 32 + b'","kind":"key_event",'
        b'"reason":"left"}'
    )


def test_expected_none_and_not_sent_differ() -> None:
    none = replace(EVENT, expected_current=None)
    unsent = replace(EVENT, expected_sent=False, expected_current=None)
    assert policy_event_payload(none)["expected_sent"] is True
    assert policy_event_bytes(none) != policy_event_bytes(unsent)
    with pytest.raises(ValueError, match="cannot carry a value"):
        policy_event_bytes(replace(EVENT, expected_sent=False))


def test_times_are_utc_whatever_the_offset_and_never_naive() -> None:
    elsewhere = AT.astimezone(timezone(timedelta(hours=-5)))
    assert policy_event_bytes(replace(EVENT, at=elsewhere)) == policy_event_bytes(EVENT)
    with pytest.raises(ValueError, match="naive"):
        policy_event_bytes(replace(EVENT, at=AT.replace(tzinfo=None)))


def test_a_key_event_names_its_own_key() -> None:
    with pytest.raises(ValueError, match="names key 5"):
        key_event_bytes(REVOKE, replace(KEY, id=6))


# Each field, and a value it can take other than the one in the fixtures above.
VERSION_CHANGES = {
    "name": "other",
    "version": 4,
    "document": {"b": 1, "a": "e"},
    "content_hash": "00" * 32,
    "author_key_id": None,
    "author": "bob",
    "created_at": AT + timedelta(microseconds=1),
}
EVENT_CHANGES = {
    "name": "other",
    "action": "activate",
    "actor_key_id": 6,
    "actor": "carol",
    "at": AT + timedelta(microseconds=1),
    "from_version": None,
    "to_version": 1,
    "reason": None,
    "expected_current": None,
}
KEY_CHANGES = {"name": "bobby", "role": "audit", "token_hash": "ce" * 32, "created_at": AT}
REVOKE_CHANGES = {
    "action": "create",
    "at": AT + timedelta(microseconds=1),
    "by_key_id": None,
    "by": "operator:root",
    "reason": None,
}


@pytest.mark.parametrize(
    ("record", "changes", "encode", "elsewhere"),
    [
        (VERSION, VERSION_CHANGES, policy_version_bytes, set()),
        (EVENT, EVENT_CHANGES, policy_event_bytes, {"expected_sent"}),
        (KEY, KEY_CHANGES, lambda k: key_event_bytes(REVOKE, k), {"id"}),
        (REVOKE, REVOKE_CHANGES, lambda e: key_event_bytes(e, KEY), {"key_id"}),
    ],
)
def test_every_field_is_covered_and_the_own_id_is_not(
    record: Any, changes: dict[str, Any], encode: Callable[[Any], bytes], elsewhere: set[str]
) -> None:
    """``elsewhere``: fields changed by another test (the expectation flag above, the key's
    id with the event's reference to it below)."""
    assert set(changes) == set(record.__dataclass_fields__) - {"id"} - elsewhere
    base = encode(record)
    for field, value in changes.items():
        assert encode(replace(record, **{field: value})) != base, field
    if "id" not in elsewhere:  # the row's own id is not in its encoding
        assert encode(replace(record, id=record.id + 1)) == base


def test_the_key_reference_is_covered() -> None:
    assert key_event_bytes(replace(REVOKE, key_id=6), replace(KEY, id=6)) != key_event_bytes(
        REVOKE, KEY
    )


@given(
    reason=st.one_of(st.none(), st.text(max_size=40)),
    actor=st.text(min_size=1, max_size=20),
    versions=st.tuples(st.none() | st.integers(1, 2**31 - 1), st.integers(1, 2**31 - 1)),
)
def test_encodings_are_json_of_their_payload(
    reason: str | None, actor: str, versions: tuple[int | None, int]
) -> None:
    """The bytes parse back (standard-library json) to exactly the payload, keys sorted."""
    event = replace(
        EVENT, reason=reason, actor=actor, from_version=versions[0], to_version=versions[1]
    )
    data = policy_event_bytes(event)
    assert json.loads(data) == policy_event_payload(event)
    assert list(json.loads(data)) == sorted(policy_event_payload(event))


def test_what_the_database_returns_encodes_as_what_was_written(
    session_factory: sessionmaker[Session],
) -> None:
    """Times, JSON documents and booleans read back from SQLite or PostgreSQL give the same
    bytes as the values written."""
    with session_factory() as session:
        key = ApiKey(name="bob", role="admin", token_hash="cd" * 32, created_at=KEY.created_at)
        session.add(key)
        session.flush()
        change = KeyEvent(key_id=key.id, action="create", at=AT, by="operator:root")
        version = PolicyVersion(**{**VERSION.__dict__, "id": None, "author_key_id": key.id})
        session.add_all([change, version])
        session.flush()
        event = PolicyEvent(**{**EVENT.__dict__, "id": None, "actor_key_id": key.id})
        event.from_version = event.to_version = 3
        session.add(event)
        session.flush()
        written = (
            key_event_bytes(change, key),
            policy_version_bytes(version),
            policy_event_bytes(event),
        )
        session.commit()
    with session_factory() as session:
        read = (
            key_event_bytes(session.scalars(select(KeyEvent)).one(), session.get(ApiKey, key.id)),
            policy_version_bytes(session.scalars(select(PolicyVersion)).one()),
            policy_event_bytes(session.scalars(select(PolicyEvent)).one()),
        )
    assert read == written
    assert json.loads(read[1])["document"] == {"a": "é", "b": 1}
    assert policy_version_payload(VERSION)["kind"] != policy_event_payload(EVENT)["kind"]
    assert key_event_payload(REVOKE, KEY)["kind"] == "key_event"
