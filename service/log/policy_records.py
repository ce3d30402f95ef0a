"""Canonical encodings of the policy and key records, as the log hashes them (Merkle leaves).

Three record kinds, each ``service.log.records.canonical`` (compact, key-sorted, UTF-8
JSON) of a flat dict of every field that matters, with a ``kind`` field naming the
record kind, so that no record of one kind can ever encode like a record of another:

- ``policy_version``: the policy name and version number, the document itself and its
  content hash (a verifier can recompute the hash from the document), the author key (id
  and name) and the creation time;
- ``policy_event``: the policy name, the action, the acting key (id and name), the time,
  the versions moved from and to (by number), the reason, and the ``expected_current`` the
  request carried (``expected_sent`` says whether it carried one; ``expected_current`` is
  then its value, ``null`` for "none");
- ``key_event``: the action (create, revoke), its time, who acted (the acting key's id, or
  null for the operator on the database, and the recorded name), the reason, and the whole
  key the event is about: its id, name, role, token hash (SHA-256 of a 256-bit random token;
  it binds the credential to its name) and creation time.

A row's own database id is left out (the log fixes each record's position). Ids of other
rows appear only as explicit references to keys (``*_key_id``: the id a ``key_event``'s
``key_id`` introduces); versions are referenced by (policy name, version number). Times are
UTC with microseconds (``2026-12-04T10:15:02.114000Z``). Changing any encoding after a
release breaks verification of the records sealed under it.

Pure, standard library only (the standalone bundle verifier imports it); rows are anything
with the fields as attributes or a mapping of them.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service.log.records import canonical, format_timestamp

POLICY_VERSION = "policy_version"
POLICY_EVENT = "policy_event"
KEY_EVENT = "key_event"


def _getter(row: Any) -> Any:
    if isinstance(row, Mapping):
        return lambda name: row[name]
    return lambda name: getattr(row, name)


def _opt_int(value: Any) -> int | None:
    return None if value is None else int(value)


def _opt_str(value: Any) -> str | None:
    return None if value is None else str(value)


def policy_version_payload(row: Any) -> dict[str, Any]:
    """A stored policy version (``PolicyVersion`` or its columns) as plain JSON data."""
    get = _getter(row)
    document = get("document")
    if not isinstance(document, Mapping):
        raise ValueError("a policy version's document must be a JSON object")
    return {
        "kind": POLICY_VERSION,
        "policy": str(get("name")),
        "version": int(get("version")),
        "document": dict(document),
        "content_hash": str(get("content_hash")),
        "author_key_id": _opt_int(get("author_key_id")),
        "author": str(get("author")),
        "created_at": format_timestamp(get("created_at")),
    }


def policy_event_payload(row: Any) -> dict[str, Any]:
    """A lifecycle event (``PolicyEvent`` or its columns) as plain JSON data."""
    get = _getter(row)
    sent = bool(get("expected_sent"))
    expected = _opt_int(get("expected_current"))
    if not sent and expected is not None:
        raise ValueError("an event without expected_current sent cannot carry a value")
    return {
        "kind": POLICY_EVENT,
        "policy": str(get("name")),
        "action": str(get("action")),
        "actor_key_id": _opt_int(get("actor_key_id")),
        "actor": str(get("actor")),
        "at": format_timestamp(get("at")),
        "from_version": _opt_int(get("from_version")),
        "to_version": _opt_int(get("to_version")),
        "reason": _opt_str(get("reason")),
        "expected_sent": sent,
        "expected_current": expected,
    }


def key_event_payload(event: Any, key: Any) -> dict[str, Any]:
    """A key event (``KeyEvent``) and the key it is about (``ApiKey``) as plain JSON data."""
    get, key_get = _getter(event), _getter(key)
    key_id = int(key_get("id"))
    if int(get("key_id")) != key_id:
        raise ValueError(f"key event names key {get('key_id')}, not the key given ({key_id})")
    return {
        "kind": KEY_EVENT,
        "action": str(get("action")),
        "at": format_timestamp(get("at")),
        "by_key_id": _opt_int(get("by_key_id")),
        "by": str(get("by")),
        "reason": _opt_str(get("reason")),
        "key_id": key_id,
        "key_name": str(key_get("name")),
        "key_role": str(key_get("role")),
        "key_token_hash": str(key_get("token_hash")),
        "key_created_at": format_timestamp(key_get("created_at")),
    }


def policy_version_bytes(row: Any) -> bytes:
    return canonical(policy_version_payload(row))


def policy_event_bytes(row: Any) -> bytes:
    return canonical(policy_event_payload(row))


def key_event_bytes(event: Any, key: Any) -> bytes:
    return canonical(key_event_payload(event, key))
