"""The canonical encoding of a decision log record and its leaf hash.

``record_hash`` = SHA-256(0x00 || canonical bytes), exactly the RFC 9162 section 2.1 Merkle leaf
hash, so a seal's tree is built directly over the stored hashes and verify recomputes them from
the stored fields. The canonical bytes are ``service.policy.document.canonical_json`` of
every field that makes up the decision; the integer row id is left out on purpose (it is
assigned by the database, and the Merkle tree already fixes each record's position).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import time
from collections.abc import Mapping
from datetime import UTC, datetime
from typing import Any

LEAF_PREFIX = b"\x00"

# The same output as ``canonical_json`` (compact, key-sorted, UTF-8, no NaN); one shared
# encoder avoids building a new one per record on the scoring hot path.
_ENCODER = json.JSONEncoder(
    sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
)

RECORD_FIELDS: tuple[str, ...] = (
    "recommendation_id",
    "request_id",
    "case_id",
    "policy",
    "version",
    "score",
    "attributes",
    "group",
    "rule",
    "probability",
    "draw",
    "action",
    "action_label",
    "issued_at",
    "shadow_version",
    "shadow_probability",
    "shadow_action",
)


def format_timestamp(value: datetime) -> str:
    """The fixed ISO form used in records and responses: microseconds, UTC, ``Z``."""
    if value.tzinfo is None:
        raise ValueError("naive datetime in a record: timestamps must be aware (UTC)")
    return value.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _get_item(rec: Any, name: str) -> Any:
    return rec[name]


def _opt_float(value: Any) -> float | None:
    return None if value is None else float(value)


def _opt_int(value: Any) -> int | None:
    return None if value is None else int(value)


def _opt_bool(value: Any) -> bool | None:
    return None if value is None else bool(value)


def record_payload(rec: Any) -> dict[str, Any]:
    """The record's fields as plain JSON data, normalised so every database gives the same.

    ``rec`` may be a :class:`~service.store.models.Recommendation`, a result row or a mapping
    of column values.
    """
    # Decided once per record, not per field: verify calls this for every record in the log.
    _get = _get_item if isinstance(rec, Mapping) else getattr
    return {
        "recommendation_id": str(_get(rec, "recommendation_id")),
        "request_id": str(_get(rec, "request_id")),
        "case_id": str(_get(rec, "case_id")),
        "policy": str(_get(rec, "policy")),
        "version": int(_get(rec, "version")),
        "score": float(_get(rec, "score")),
        "attributes": dict(_get(rec, "attributes")),
        "group": str(_get(rec, "group")),
        "rule": str(_get(rec, "rule")),
        "probability": float(_get(rec, "probability")),
        "draw": float(_get(rec, "draw")),
        "action": bool(_get(rec, "action")),
        "action_label": str(_get(rec, "action_label")),
        "issued_at": format_timestamp(_get(rec, "issued_at")),
        "shadow_version": _opt_int(_get(rec, "shadow_version")),
        "shadow_probability": _opt_float(_get(rec, "shadow_probability")),
        "shadow_action": _opt_bool(_get(rec, "shadow_action")),
    }


def record_bytes(rec: Any) -> bytes:
    """``canonical_json(record_payload(rec))``."""
    return _ENCODER.encode(record_payload(rec)).encode("utf-8")


def record_leaf_hash(rec: Any) -> str:
    """SHA-256(0x00 || canonical bytes) as lowercase hex: the record's Merkle leaf hash."""
    return hashlib.sha256(LEAF_PREFIX + record_bytes(rec)).hexdigest()


def _scalar(value: Any) -> str:
    """One JSON scalar exactly as the encoder writes it (no NaN ever reaches here)."""
    if value is None:
        return "null"
    if value is True:
        return "true"
    if value is False:
        return "false"
    if isinstance(value, float):
        if value != value or value in (float("inf"), float("-inf")):
            raise ValueError("NaN or infinity in a record")
        return float.__repr__(value)
    if isinstance(value, int):
        return int.__repr__(value)
    return _string(value)


_string = json.encoder.encode_basestring  # the encoder's own routine (ensure_ascii=False)
_SORTED_FIELDS = tuple(sorted(RECORD_FIELDS))
_TEMPLATE = "{" + ",".join(f'"{k}":%s' for k in _SORTED_FIELDS) + "}"


def encode_attributes(attributes: dict[str, Any]) -> str:
    """Canonical JSON text of a record's attributes (also what the JSON column stores)."""
    return _ENCODER.encode(attributes)


# -- the scoring hot path: a fresh decision's record bytes and its API response at once -----

# The response is the record without the score, the attributes and the shadow result, in
# the record's field order (the order the API has always sent; a replay re-encodes a stored
# record with json.dumps in this order and must give the same bytes).
RESPONSE_FIELDS: tuple[str, ...] = tuple(
    f
    for f in RECORD_FIELDS
    if f not in ("score", "attributes", "shadow_version", "shadow_probability", "shadow_action")
)
_RESPONSE_TEMPLATE = "{" + ",".join(f'"{k}":%s' for k in RESPONSE_FIELDS) + "}"


def decision_texts(payload: dict[str, Any], attributes_json: str) -> tuple[bytes, str]:
    """(canonical bytes, response JSON) of a new decision in :func:`record_payload` form.

    Each field is encoded once, by its known type, and used in both texts: the canonical
    bytes equal ``canonical_json(payload)`` and the response equals ``json.dumps`` of the
    response fields, compact and UTF-8 (tests check both on generated records).
    """
    text = _string
    score, probability, draw = payload["score"], payload["probability"], payload["draw"]
    if not (math.isfinite(score) and math.isfinite(probability) and math.isfinite(draw)):
        raise ValueError("NaN or infinity in a record")
    rid = text(payload["recommendation_id"])
    request_id = text(payload["request_id"])
    case_id = text(payload["case_id"])
    policy = text(payload["policy"])
    version = int.__repr__(payload["version"])
    group = text(payload["group"])
    rule = text(payload["rule"])
    prob = float.__repr__(probability)
    u = float.__repr__(draw)
    action = "true" if payload["action"] else "false"
    label = text(payload["action_label"])
    issued = text(payload["issued_at"])
    record = _TEMPLATE % (  # in _SORTED_FIELDS order (checked below)
        action,
        label,
        attributes_json,
        case_id,
        u,
        group,
        issued,
        policy,
        prob,
        rid,
        request_id,
        rule,
        float.__repr__(score),
        _scalar(payload["shadow_action"]),
        _scalar(payload["shadow_probability"]),
        _scalar(payload["shadow_version"]),
        version,
    )
    response = _RESPONSE_TEMPLATE % (  # in RESPONSE_FIELDS order
        rid,
        request_id,
        case_id,
        policy,
        version,
        group,
        rule,
        prob,
        u,
        action,
        label,
        issued,
    )
    return record.encode("utf-8"), response


assert _SORTED_FIELDS == (
    "action",
    "action_label",
    "attributes",
    "case_id",
    "draw",
    "group",
    "issued_at",
    "policy",
    "probability",
    "recommendation_id",
    "request_id",
    "rule",
    "score",
    "shadow_action",
    "shadow_probability",
    "shadow_version",
    "version",
), "decision_texts writes the fields in this order"


def leaf_hash(canonical: bytes) -> str:
    """SHA-256(0x00 || canonical bytes) as lowercase hex."""
    return hashlib.sha256(LEAF_PREFIX + canonical).hexdigest()


def new_record_ids(count: int) -> list[str]:
    """``count`` fresh UUIDs of version 7 (RFC 9562 section 5.7): 48 bits of Unix time in
    milliseconds, then random bits. Time-ordered ids land at the end of the unique index
    instead of on a random page of it, which keeps the log's inserts cheap as it grows."""
    millis = time.time_ns() // 1_000_000
    random_bytes = os.urandom(10 * count)
    ids = []
    for i in range(count):
        rand = int.from_bytes(random_bytes[10 * i : 10 * i + 10], "big")
        value = (
            (millis << 80)
            | (0x7 << 76)  # version 7
            | (((rand >> 62) & 0xFFF) << 64)  # rand_a, 12 bits
            | (0b10 << 62)  # the RFC variant
            | (rand & ((1 << 62) - 1))  # rand_b, 62 bits
        )
        h = f"{value:032x}"
        ids.append(f"{h[:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:]}")
    return ids
