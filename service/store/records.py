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


def _get(rec: Any, name: str) -> Any:
    return rec[name] if isinstance(rec, Mapping) else getattr(rec, name)


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


def payload_leaf_hash(payload: dict[str, Any]) -> str:
    """The leaf hash of a payload already in :func:`record_payload` form (the hot path)."""
    return hashlib.sha256(LEAF_PREFIX + _ENCODER.encode(payload).encode("utf-8")).hexdigest()
